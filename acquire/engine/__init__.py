"""The measurement sequence as a state machine: capture of readings from the sample stream, the
states and their transitions, and the snapshot every client is sent.

It is fed inputs and a clock; it knows no transport, socket or event loop.
"""
