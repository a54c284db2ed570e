"""simulated_rig package."""
