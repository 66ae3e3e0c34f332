"""``python -m unmix.cli``: the same as the ``unmix`` command."""

from .main import main

if __name__ == "__main__":
    raise SystemExit(main())
