"""Benchmarks: each ``bench_*.py`` module has a ``main()`` printing ratios to baselines
measured in the same run.  ``python -m benchmarks`` runs them all."""
