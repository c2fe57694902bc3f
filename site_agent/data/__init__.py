"""A site's own data: the predictions table and its validation."""
