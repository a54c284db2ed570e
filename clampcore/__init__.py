"""clampcore package."""
