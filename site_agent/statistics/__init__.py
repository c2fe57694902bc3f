"""Site statistics: summaries, ROC and AUC, proportions, agreement, calibration, metrics."""
