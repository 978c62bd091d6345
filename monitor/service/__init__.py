"""The running service: configuration, loading constants, the processing pipeline, the daemon and the daily reports."""
