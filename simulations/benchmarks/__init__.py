"""Benchmark scripts (make bench): figures go in the README, never into tests."""
