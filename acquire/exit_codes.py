"""The exit status of every `chargebook` command and of the processes it starts."""

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_INVALID_INPUT = 2

#: What every command's exit status means, shown by ``--help`` and in the README.
EXIT_STATUS_HELP = (
    "exit status: 0 done; 1 the command ran and found a failure (a replay that does not "
    "reproduce, a daemon, instrument or database that cannot be reached or read); 2 the input "
    "cannot be used (a bad option or value, a file or session that does not exist)"
)
