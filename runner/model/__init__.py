"""Models of what users write: job files and workspace settings (pure: pydantic, no effects)."""
