"""stopwise."""
