"""The ``unmix`` command line: subcommands that translate arguments into library calls.

Exit codes: 0 success, 2 bad input (one ``error:`` line on stderr, naming the
file or option and the fix; ``warning:`` lines may precede it), 1 internal
failure. ``--debug`` shows tracebacks. Heavy libraries are imported inside
the subcommands, so ``unmix --help`` starts at once.
"""

from __future__ import annotations

import argparse
import difflib
import logging
import re
import sys
import traceback
import warnings

from .._version import __version__
from ..errors import InputError
from . import align, apply, coloc, demo, measure, optics, report
from .args import one_line


DESCRIPTION = """\
Measure how much each fluorescent label leaks into the other labels' channels
(bleed-through) from single-label control images, remove it from your stacks,
and check whether the overlap between two labels survives the correction.
Start with the demo, then measure, apply, coloc and report on your own data."""

EXAMPLES = """\
examples:
  unmix demo -o unmix-demo
      run the whole job on invented demo data; open unmix-demo/demo_report.html
  unmix measure --control LabelA=a1.ome.tif,a2.ome.tif,a3.ome.tif \\
                --control LabelB=b1.ome.tif,b2.ome.tif,b3.ome.tif \\
                --unstained unstained.ome.tif -o matrix.json
      measure the bleed-through matrix from three control fields per label

Each command has its own help: unmix COMMAND --help"""


class _HelpFormatter(argparse.RawDescriptionHelpFormatter):
    """Text kept as written; the commands listed without a "COMMAND" line above them."""

    def _format_action(self, action):
        if isinstance(action, argparse._SubParsersAction):
            return "".join(self._format_action(choice) for choice in action._get_subactions())
        return super()._format_action(action)


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
    parser = _Parser(prog="unmix", description=DESCRIPTION, epilog=EXAMPLES,
                     formatter_class=_HelpFormatter)
    parser.add_argument("--version", action="version", version=f"unmix {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    common.add_argument("--quiet", action="store_true", help="print nothing but warnings and errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser, title="commands")
    sub.required = True

    for module in (measure, align, apply, coloc, optics, report, demo):
        module.add_parsers(sub, common)
    return parser


def _suggestion(name: str, known) -> str | None:
    """The known name closest to a misspelt one (underscores read as hyphens), or None."""
    known = list(known)
    if name.replace("_", "-") in known:
        return name.replace("_", "-")
    close = difflib.get_close_matches(name, known, n=1, cutoff=0.6)
    return close[0] if close else None


def _check_names(parser: argparse.ArgumentParser, argv) -> None:
    """Refuse a misspelt command or option by name, with the nearest correct one.

    argparse alone reports a misspelt option only as "unrecognized arguments", or worse, as a
    missing required option (``--matrx`` for ``--matrix``). Options are checked as argparse
    reads them: exact names, unique prefixes, ``--name=value`` and ``-oVALUE``; values that look
    like negative numbers are values.
    """
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices
    top = [o for a in parser._actions for o in a.option_strings]
    position = next((i for i, token in enumerate(argv) if not token.startswith("-")), None)
    for token in argv[:position]:
        if token not in top:
            raise InputError(f"unmix: unknown option {token} before the command; options go after it "
                             "(unmix COMMAND --option); see 'unmix --help'")
    if position is None:
        return
    command = argv[position]
    if command not in commands:
        near = _suggestion(command, commands)
        raise InputError(f"unmix: unknown command {command!r}" + (f"; did you mean {near!r}?" if near else
                                                                   "; see 'unmix --help'"))
    options = [o for a in commands[command]._actions for o in a.option_strings]
    for token in argv[position + 1:]:
        if token == "--":
            break
        if not token.startswith("-") or token == "-" or re.fullmatch(r"-\d[\d.,eE+-]*", token):
            continue
        name = token.split("=", 1)[0]
        if name in options or (name.startswith("--") and len([o for o in options if o.startswith(name)]) == 1):
            continue
        if not name.startswith("--") and token[:2] in options:  # a short option with its value: -oOUT
            continue
        near = _suggestion(name, options)
        raise InputError(f"unmix {command}: unknown option {name}; "
                         + (f"did you mean {near}?" if near else f"see 'unmix {command} --help'"))


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
        parser = build_parser()
        _check_names(parser, argv)
        args = parser.parse_args(argv)
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
