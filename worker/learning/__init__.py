"""The machine-learning code: pipelines, scoring, search, learning curves, fit readings, the catalog."""
