"""Monitoring over time windows: rounds, drift statistics, control charts, store, alerts."""
