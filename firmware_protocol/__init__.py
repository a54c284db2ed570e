"""firmware_protocol package."""
