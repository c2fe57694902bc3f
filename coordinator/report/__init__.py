"""Reports: the study report, plots, adaptation section, drift report and CSV exports."""
