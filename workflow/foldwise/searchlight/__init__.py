"""Searchlight: spheres and the batched per-sphere engines."""
