"""Fault-injection runs: scripts run by hand (``python -m tests.faults.<name> [--smoke]``), each
breaking one part of the real system on purpose and counting what survived. See
the README's "Performance and robustness" section."""
