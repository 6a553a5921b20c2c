"""Persistence: the checksummed checkpoint file, its columnar blocks, ``sigmad inspect``."""
