"""What a session is, as data: plans, metadata, worksheets, the rules of operator input and the
one evaluation of a session (``evaluation.evaluate_session``) that every output uses.

It reads the record and computes through ``corrections``; it does no I/O of its own.
"""
