"""Shared set-up for the whole suite."""

import os

# The commands wrap their text to the terminal, or to $COLUMNS when it is set, and keep lines
# whole when writing to a pipe. pytest-xdist sets COLUMNS in its workers; the tests expect what a
# pipe gets unless a test sets a width itself.
os.environ.pop("COLUMNS", None)
os.environ.pop("LINES", None)
