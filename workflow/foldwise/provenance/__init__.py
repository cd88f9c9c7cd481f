"""Hashing, the content memo, provenance records and the reviewer bundle."""
