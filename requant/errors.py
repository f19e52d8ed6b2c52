"""Exception types.

Domain code never prints: it raises one of these with a message that names
the problem and says what to do next. Only the CLI catches them, prints the
message on one line and exits with :attr:`RequantError.exit_code`.

Exit codes (documented in the README):

* 0 -- success
* 1 -- a batch finished but some files failed
* 2 -- usage error or bad input (nothing was written)
* 130 -- interrupted (Ctrl-C); nothing partial is left behind
"""

__all__ = ["RequantError", "UsageError", "InputError", "OutputError"]


class RequantError(Exception):
    """Base class: a problem the user can fix. The message is one sentence."""

    exit_code = 2


class UsageError(RequantError, ValueError):
    """An option value that is not allowed (wrong range, unknown name)."""


class InputError(RequantError, ValueError):
    """An input file that cannot be used as it is (unreadable, NaN, ...)."""


class OutputError(RequantError, OSError):
    """An output that cannot be written (exists, is the input, no space, ...)."""
