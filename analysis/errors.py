"""The one error type that driftspec raises for bad input."""


class InputError(ValueError):
    """Unreadable or malformed input.

    The message is one line naming the file and, where it applies, the row and column; the command line
    prints it without a traceback and exits with status 2.
    """
