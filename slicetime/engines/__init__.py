"""engines layer."""
