"""gui package."""
