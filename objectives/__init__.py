"""Design goals, one module each, registered by name (filled by the search stage)."""
