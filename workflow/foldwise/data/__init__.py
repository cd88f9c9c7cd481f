"""Dataset reading: BIDS layouts, events, confounds, NIfTI and TSV I/O, the demo simulator."""
