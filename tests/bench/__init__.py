"""Benchmarks: scripts run by hand (``python -m tests.bench.<name> [--smoke]``), each printing its
figures as a ratio against a baseline measured in the same run. The figures measured are in the
README's "Performance and robustness" section."""
