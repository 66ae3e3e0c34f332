"""The ``unmix`` command line: subcommands that translate arguments into library calls.

Exit codes: 0 success, 2 bad input (one ``error:`` line on stderr, naming the
file or option and the fix; ``warning:`` lines may precede it), 1 internal
failure. ``--debug`` shows tracebacks. Heavy libraries are imported inside
the subcommands, so ``unmix --help`` starts at once.
"""

from __future__ import annotations

import argparse
import logging
import sys
import traceback
import warnings

from .._version import __version__
from ..errors import InputError
from . import align, apply, coloc, demo, measure, optics, report
from .args import one_line


class _Parser(argparse.ArgumentParser):
    """argparse with the contract's one-line error and exit code 2."""

    def error(self, message):
        raise InputError(f"{self.prog}: {message}; see '{self.prog} --help'")


def _show_warning(message, category, filename, lineno, file=None, line=None):
    print(f"warning: {one_line(message)}", file=sys.stderr)


class _WarningLines(logging.Handler):
    def emit(self, record):
        print(f"warning: {record.name}: {one_line(record.getMessage())}", file=sys.stderr)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="unmix", description=__doc__.split("\n")[0])
    parser.add_argument("--version", action="version", version=f"unmix {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    common.add_argument("--quiet", action="store_true", help="print nothing but warnings and errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    for module in (measure, align, apply, coloc, optics, report, demo):
        module.add_parsers(sub, common)
    return parser


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    debug = "--debug" in argv
    with warnings.catch_warnings():
        warnings.showwarning = _show_warning
        warnings.simplefilter("default")
        return _run(argv, debug)


def _run(argv, debug: bool) -> int:
    handler = _WarningLines(logging.WARNING)
    logging.getLogger().addHandler(handler)
    try:
        args = build_parser().parse_args(argv)
        return args.run(args)
    except InputError as exc:
        print(f"error: {one_line(exc)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("error: interrupted; outputs not finished were not written", file=sys.stderr)
        return 130
    except SystemExit as exc:  # --help and --version
        return int(exc.code or 0)
    except Exception as exc:  # noqa: BLE001 - the last line of defence
        if debug:
            traceback.print_exc()
        print(f"internal error: {type(exc).__name__}: {one_line(exc)}; rerun with --debug and report it",
              file=sys.stderr)
        return 1
    finally:
        logging.getLogger().removeHandler(handler)



if __name__ == "__main__":
    raise SystemExit(main())
