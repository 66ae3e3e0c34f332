"""The one error type a user can fix.

Every check of user input raises :class:`InputError` with a message that
names the offending file, option or label, says what is wrong and what to do.
The command line prints that message as its single error line and exits
with code 2; anything else is an internal failure (exit code 1).
"""


class InputError(ValueError):
    """Bad input that the user can fix (exit code 2 on the command line)."""


class InputWarning(UserWarning):
    """Something in the input deserves attention but does not stop the run."""
