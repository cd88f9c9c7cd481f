"""Fold-aware decoding: folds, voxel selection, classifiers, curves and cross-decoding."""
