"""Replaying a recorded session through the real driver and engine, and comparing the result with
the original, reading by reading.
"""
