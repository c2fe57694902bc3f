"""simulations package."""
