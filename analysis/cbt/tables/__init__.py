"""Precomputed exact short-array tables for the long-array CBT model (see make_tables.py)."""
