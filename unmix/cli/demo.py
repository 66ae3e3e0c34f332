"""``unmix demo``: the whole job on the shipped demo scenario."""

from __future__ import annotations


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    demo = sub.add_parser("demo", parents=[common], help="run the whole job on the shipped demo scenario",
                          description="Run the tool on the shipped demo scenario and print where the results are.")
    demo.add_argument("-o", "--output", default="unmix-demo", metavar="OUTDIR", help="output folder (unmix-demo)")
    demo.set_defaults(run=run_demo)


def run_demo(args) -> int:
    from ..demo.runner import run_demo
    from .args import check_output_folder

    run_demo(check_output_folder(args.output, []))
    return 0

