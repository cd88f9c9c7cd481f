"""Job functions: one per workflow step, ``run(inputs, outputs, params, log)``, file I/O at the edges."""
