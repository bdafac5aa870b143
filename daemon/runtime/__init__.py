"""ionwarden."""
