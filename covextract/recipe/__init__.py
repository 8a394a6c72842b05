"""covextract."""
