"""The reporting layer: figures and the human-readable summary of a finished sweep."""
