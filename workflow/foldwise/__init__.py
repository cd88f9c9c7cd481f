"""foldwise: the science of an fMRI MVPA study as small, pure, tested functions.

The Snakemake rules under ``workflow/rules`` are wiring; every number is made
here. Modules, in pipeline order:

``errors``      the one exception type for bad input (file, field, fix)
``hashing``     canonical hashes of config, code and file contents
``fileio``      atomic, deterministic writers and NIfTI/TSV readers
``config``      schema validation of the study config
``bids``        the dataset reader (BIDS entities, events, sidecars, confounds)
``demo``        the invented demo study simulator
``hrf``, ``design``, ``glm``   condition patterns from BOLD runs
``masks``       brain masks and ROI masks
``folds``, ``selection``, ``classifiers``, ``decoding``   fold-aware decoding
``group``       group statistics
``memo``        the content-addressed job memo and provenance records
``report``      the study report
"""

__all__ = ["__version__"]
__version__ = "0.1.0"
