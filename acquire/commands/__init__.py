"""The composition root: one module per `chargebook` subcommand, the command line that chooses
among them (``cli``), the demo and the automatic operator. Only here are the rooms put together.
"""
