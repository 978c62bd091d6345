"""Station monitor: configuration, feeds, store, quality control, daemon and command line."""
