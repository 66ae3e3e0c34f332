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


# Text inputs (matrix, description, spectrum CSV, coloc results) larger than this are refused
# unread: real ones are kilobytes to a few megabytes.
MAX_TEXT_BYTES = 64 << 20


def check_regular_file(path, what: str):
    """InputError unless `path` is a regular file (a FIFO, a device or a socket would block or never
    end); the path as a Path. A folder is refused too: callers that read folders check first."""
    import errno
    import os
    import stat
    from pathlib import Path

    path = Path(path)
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise InputError(f"{path}: no such {what}; check the path") from None
    except (OSError, RuntimeError) as exc:
        reason = "a symbolic link loop" if getattr(exc, "errno", None) == errno.ELOOP else type(exc).__name__
        raise InputError(f"{path}: cannot open the {what} ({reason}); check the path") from None
    if stat.S_ISDIR(mode):
        raise InputError(f"{path}: is a folder, not a {what}; give a file")
    if not stat.S_ISREG(mode):
        raise InputError(f"{path}: is not a regular file (a pipe or a device); give the {what} as a file")
    return path


def read_user_text(path, what: str, fix: str, encoding: str = "utf-8") -> str:
    """The text of a user's file; InputError naming it when it is missing, not a regular file,
    larger than MAX_TEXT_BYTES or unreadable.

    `what` names the kind of file ("matrix file"), `fix` says what to do when
    it cannot be read as text.
    """
    path = check_regular_file(path, what)
    try:
        with open(path, "rb") as handle:
            data = handle.read(MAX_TEXT_BYTES + 1)
        if len(data) > MAX_TEXT_BYTES:
            raise InputError(f"{path}: larger than {MAX_TEXT_BYTES >> 20} MiB, too large for a {what}; "
                             "check that this is the right file")
        text = data.decode(encoding)
    except FileNotFoundError:
        raise InputError(f"{path}: no such {what}; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read the {what} ({type(exc).__name__}); {fix}") from None
    # Universal newlines, as Path.read_text gives.
    return text.replace("\r\n", "\n").replace("\r", "\n")
