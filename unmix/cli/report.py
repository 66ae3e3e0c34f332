"""``unmix report``: one self-contained HTML report."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .args import check_output


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    report = sub.add_parser("report", parents=[common], help="one self-contained HTML report",
                            description="Write one self-contained HTML report: each pair's verdict first, then QC "
                                        "problems, the sample raw and unmixed, the matrix and its QC, measured "
                                        "versus predicted, inputs and checksums.")
    report.add_argument("--matrix", required=True, metavar="MATRIX.json",
                        help="the matrix file the results rest on (the one given to unmix coloc)")
    report.add_argument("--predicted", metavar="PREDICTED.json", help="add measured versus predicted")
    report.add_argument("--coloc", action="append", metavar="COLOC.json",
                        help="results of unmix coloc --json made with --matrix; repeatable")
    report.add_argument("--sample", action="append", metavar="IMAGE",
                        help="a raw image to show raw beside unmixed (middle plane of a stack); repeatable")
    report.add_argument("--description", metavar="DESCRIPTION.toml", help="draw the label spectra and channel bands")
    report.add_argument("-o", "--output", required=True, metavar="REPORT.html")
    report.set_defaults(run=run_report)


def run_report(args) -> int:
    from ..matrix import load_matrix
    from ..report.html import build_report, load_coloc_results, write_report

    inputs = ([args.matrix] + ([args.predicted] if args.predicted else []) + list(args.coloc or [])
              + list(args.sample or []) + ([args.description] if args.description else []))
    output = check_output(args.output, inputs)
    if not output.name.lower().endswith((".html", ".htm")):
        raise InputError(f"-o {args.output}: the report is HTML; give a name ending in .html")
    matrix = load_matrix(args.matrix)
    predicted = load_matrix(args.predicted) if args.predicted else None
    files = [load_coloc_results(path) for path in args.coloc or []]
    description = None
    if args.description:
        from ..optics.description import load_description

        description = load_description(args.description)
    for path in args.sample or []:
        if not Path(path).exists():
            raise InputError(f"--sample {path}: no such file; check the path")
    write_report(output, build_report(matrix, matrix_path=args.matrix, predicted=predicted,
                                      predicted_path=args.predicted,
                                      coloc_records=[record for file in files for record in file.records],
                                      time_summaries=[summary for file in files for summary in file.time_summaries],
                                      samples=args.sample or [], description=description,
                                      description_path=args.description))
    if not args.quiet:
        print(f"wrote {output}")
    return 0

