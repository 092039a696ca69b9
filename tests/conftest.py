"""Shared set-up for the whole suite."""

import os

import pytest

try:  # CI's floor job runs one console test with pytest alone, without the test extra
    from hypothesis import settings
except ImportError:
    settings = None
if settings is not None:
    # Hypothesis fails an example that takes over 200 ms by default: a timed assertion, which
    # a loaded machine trips with nothing wrong. The suite makes none.
    settings.register_profile("chargebook", deadline=None)
    settings.load_profile("chargebook")

# The commands wrap their text to the terminal, or to $COLUMNS when it is set, and keep lines
# whole when writing to a pipe. pytest-xdist sets COLUMNS in its workers; the tests expect what a
# pipe gets unless a test sets a width itself.
os.environ.pop("COLUMNS", None)
os.environ.pop("LINES", None)

#: Workers per core for `-n auto`. Most of the suite's time is spent waiting on real processes
#: (a daemon, the simulated electrometer, a console) rather than computing: a run measured
#: 340 s of CPU in 1,390 s of the workers' time.
WORKERS_PER_CORE = 2


@pytest.hookimpl(optionalhook=True)
def pytest_xdist_auto_num_workers(config: pytest.Config) -> int:
    """Return how many workers `-n auto` starts: WORKERS_PER_CORE per core."""
    return WORKERS_PER_CORE * (os.cpu_count() or 1)
