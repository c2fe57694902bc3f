"""site_agent package."""
