"""coordinator package."""
