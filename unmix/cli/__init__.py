"""The ``unmix`` command line.

In: the arguments of one subcommand. Out: library calls, files, a summary on
the terminal and the contract's exit code. One module per subcommand
(:mod:`.measure`, :mod:`.apply`, :mod:`.coloc`, :mod:`.optics` for predict,
compare and plan, :mod:`.report`, :mod:`.demo`); :mod:`.main` builds the
parser and turns errors into one line; :mod:`.args` holds the argument
helpers they share.
"""

from .main import build_parser, main

__all__ = ["build_parser", "main"]
