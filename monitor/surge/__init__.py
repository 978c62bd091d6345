"""The surge: residual (observed minus predicted), skew surges, and the next high water forecast."""
