"""What runs and what it touches: execution, delivery of alerts (effects live here)."""
