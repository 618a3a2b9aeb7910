"""solver."""
