"""Brain masks and ROI masks."""
