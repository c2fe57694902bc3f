"""Adaptation: federated rounds, fine-tuning requests and adaptation-budget curves."""
