"""interfaces layer."""
