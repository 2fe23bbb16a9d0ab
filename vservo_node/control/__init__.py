"""control."""
