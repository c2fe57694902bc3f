"""Training at the site: model bundles, patient-grouped splits and local fine-tuning."""
