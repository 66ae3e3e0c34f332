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


def check_output(path: str, inputs, option: str = "-o") -> Path:
    out = Path(path)
    resolved = out.resolve()
    for source in inputs:
        if Path(source).resolve() == resolved:
            raise InputError(f"{option} {path}: is also an input file; choose another output name")
    if out.is_dir():
        raise InputError(f"{option} {path}: is a folder; give a file name")
    if not out.parent.resolve().is_dir():
        raise InputError(f"{option} {path}: folder {out.parent} does not exist; create it first")
    if not os.access(out.parent.resolve(), os.W_OK):
        raise InputError(f"{option} {path}: folder {out.parent} is not writable; choose another location")
    return out


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
