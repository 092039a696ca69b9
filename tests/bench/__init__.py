"""Benchmarks: scripts run by hand (``python -m tests.bench.<name> [--smoke]``), each printing its
figures as a ratio against a baseline measured in the same run. See ``RESULTS.md``."""
