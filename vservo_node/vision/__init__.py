"""vision."""
