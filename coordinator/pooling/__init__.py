"""Pooling releases into study results: estimates, meta-analysis and comparisons."""
