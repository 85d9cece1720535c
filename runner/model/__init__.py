"""Models of what users write: job files, the schema files they name, and workspace settings (no effects beyond reading those files)."""
