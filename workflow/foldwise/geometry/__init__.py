"""Representational geometry: cross-validated distances, models, comparison, noise ceilings, group tests."""
