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


def read_user_text(path, what: str, fix: str, encoding: str = "utf-8") -> str:
    """The text of a user's file; InputError naming it when it is missing or unreadable.

    `what` names the kind of file ("matrix file"), `fix` says what to do when
    it cannot be read as text.
    """
    from pathlib import Path

    path = Path(path)
    try:
        return path.read_text(encoding=encoding)
    except FileNotFoundError:
        raise InputError(f"{path}: no such {what}; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read the {what} ({type(exc).__name__}); {fix}") from None
