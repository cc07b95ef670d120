"""Layer 2: loaders and writers (depends on data only)."""
