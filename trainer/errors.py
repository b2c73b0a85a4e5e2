"""The one exception type for the user's mistakes.

A ``UserError`` carries a one-line message that names the file, column or option at fault and what
was expected. The command line prints it on one line and exits 2; anything else is a bug and keeps
its traceback (exit 1).
"""


class UserError(Exception):
    """A mistake in the user's input: bad spec, bad data, bad option or an unusable model folder."""


class Diverged(UserError):
    """Training produced a non-finite loss or weight; the message says what the model folder keeps."""


class Interrupted(Exception):
    """Training stopped on SIGINT or SIGTERM after saving a checkpoint; the message says how to resume."""
