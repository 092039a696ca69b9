"""The exit status of every `chargebook` command and of the processes it starts."""

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_INVALID_INPUT = 2
#: The daemon stopped while the record could not commit: the raw lines it held are in a side
#: file beside the station database, recorded by its next start (``acquire/record/unrecorded``).
EXIT_LINES_SET_ASIDE = 3

#: What every command's exit status means, shown by ``--help`` and in the README.
EXIT_STATUS_HELP = (
    "exit status: 0 done; 1 the command ran and found a failure (a replay that does not "
    "reproduce, a daemon, instrument or database that cannot be reached or read); 2 the input "
    "cannot be used (a bad option or value, a file or session that does not exist); 3 (serve) "
    "the daemon stopped while the database could not commit: the raw lines it held are in a "
    "file beside the database, recorded at its next start"
)
