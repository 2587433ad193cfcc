"""Classical and model-based quality checks."""
