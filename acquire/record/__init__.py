"""The record: the only code that writes SQL. The station database's tables, migrations, the
per-session hash chain and its verification, backups, reviews and the station lock.

It keeps what it is given and judges nothing; it imports no room above it.
"""
