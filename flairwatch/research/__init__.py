"""Research tools: re-runs after a model update, validation, metrics, export, gallery, QC marks."""
