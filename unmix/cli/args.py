"""Argument helpers shared by the subcommands: label=path lists, numbers, output checks."""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError


def one_line(text) -> str:
    """A message on one line (the contract's one-line errors and warnings)."""
    return " ".join(str(text).split())


def label_paths(values: list[str], option: str) -> dict[str, list[str]]:
    result: dict[str, list[str]] = {}
    for value in values or []:
        label, sep, paths = value.partition("=")
        label = label.strip()
        if not sep or not label or not paths.strip():
            raise InputError(f"{option} {value!r}: write it as LABEL=PATH[,PATH...]")
        if label in result:
            raise InputError(f"{option}: label {label!r} is given twice; give each label once "
                             "(several fields of one label as LABEL=PATH1,PATH2)")
        files = [p.strip() for p in paths.split(",")]
        if any(not p for p in files):
            raise InputError(f"{option} {value!r}: empty path in the list; separate paths with single commas")
        result[label] = files
    return result


def label_values(values: list[str], option: str) -> dict[str, str]:
    result = {}
    for value in values or []:
        label, sep, target = value.partition("=")
        if not sep or not label.strip() or not target.strip():
            raise InputError(f"{option} {value!r}: write it as LABEL=CHANNEL")
        if label.strip() in result:
            raise InputError(f"{option}: label {label.strip()!r} is given twice; give it once")
        result[label.strip()] = target.strip()
    return result


def numbers(text: str | None, option: str):
    if text is None:
        return None
    try:
        values = [float(v) for v in text.split(",")]
    except ValueError:
        raise InputError(f"{option} {text!r}: give one number, or one per channel separated by commas") from None
    if not all(v > 0 and v < float("inf") for v in values):
        raise InputError(f"{option} {text!r}: levels must be positive finite numbers")
    return values[0] if len(values) == 1 else values


def name_list(text: str | None):
    return None if text is None else [n.strip() for n in text.split(",")]


def _writable_folder(folder: Path, path: str, option: str) -> None:
    """InputError unless `folder` (of the output `path`) is an existing, writable folder."""
    try:
        resolved = folder.resolve(strict=True)
    except FileNotFoundError:
        raise InputError(f"{option} {path}: folder {folder} does not exist; create it first") from None
    except (OSError, RuntimeError):
        raise InputError(f"{option} {path}: {folder} cannot be resolved (a symbolic link loop?); "
                         "give another location") from None
    if not resolved.is_dir():
        raise InputError(f"{option} {path}: {folder} is a file, not a folder; give another location")
    if not os.access(resolved, os.W_OK):
        raise InputError(f"{option} {path}: folder {folder} is not writable; choose another location")


def check_output(path: str, inputs, option: str = "-o") -> Path:
    """The output file `path`, checked before anything is computed: not an input, not inside an
    input folder (OME-Zarr), not a folder, in a writable folder, with a name a file system takes."""
    from ..io.atomic import check_name_length, check_outside_inputs

    out = Path(path)
    check_outside_inputs(out, inputs, option)
    check_name_length(out, option)
    if out.is_dir():
        raise InputError(f"{option} {path}: is a folder; give a file name")
    if os.path.lexists(out) and not out.is_file():
        raise InputError(f"{option} {path}: exists and is not a regular file; give another name")
    _writable_folder(out.parent, path, option)
    return out


def check_output_folder(path: str, inputs, option: str = "-o") -> Path:
    """The output folder `path` (made later if missing), checked like :func:`check_output`."""
    from ..io.atomic import check_outside_inputs

    out = Path(path)
    check_outside_inputs(out, inputs, option)
    if os.path.lexists(out) and not out.is_dir():
        raise InputError(f"{option} {path}: is a file; give a folder")
    _writable_folder(next((p for p in [out, *out.parents] if os.path.lexists(p)), Path(".")), path, option)
    return out


def memory_size(text: str | None, option: str = "--memory") -> int | None:
    """Bytes from a size like 512M, 4G or 1073741824 (powers of 1024)."""
    if text is None:
        return None
    units = {"": 1, "K": 1 << 10, "M": 1 << 20, "G": 1 << 30, "T": 1 << 40}
    value = text.strip().upper().removesuffix("IB").removesuffix("B")
    unit = value[-1:] if value[-1:] in units else ""
    try:
        number = float(value[:len(value) - len(unit)])
    except ValueError:
        number = float("nan")
    if not (number > 0 and number < float("inf")):
        raise InputError(f"{option} {text!r}: give a size such as 512M or 4G")
    return int(number * units[unit])


def add_image_options(parser):
    parser.add_argument("--axes", help="axis letters of the stored arrays, e.g. ZCYX (overrides metadata)")
    parser.add_argument("--channel-names", help="comma-separated channel names (overrides metadata)")



def add_registration_option(parser):
    parser.add_argument("--registration", metavar="REGISTRATION.json",
                        help="per-channel shifts from 'unmix align', applied to the images first")


def registration_from(args):
    """The registration file named by --registration, loaded and validated; None without one."""
    if not getattr(args, "registration", None):
        return None
    from ..measure.registration import load_registration

    return load_registration(args.registration)


def add_settings_option(parser):
    parser.add_argument("--strict-settings", action="store_true",
                        help="refuse inputs whose acquisition settings (OME metadata) differ from the controls' "
                             "(default: one warning per difference)")
