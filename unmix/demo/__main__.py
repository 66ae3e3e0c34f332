"""``python -m unmix.demo generate OUTDIR``: re-create the demo stacks."""

import sys

from .scenario import generate


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if len(argv) == 2 and argv[0] == "generate":
        for path in generate(argv[1]):
            print(path)
        return 0
    print("usage: python -m unmix.demo generate OUTDIR", file=sys.stderr)
    return 2


if __name__ == "__main__":
    raise SystemExit(main())
