"""``unmix predict``, ``unmix compare`` and ``unmix plan``: the matrix predicted from spectra and optics."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .args import check_output, check_output_folder


def add_parsers(sub, common) -> None:
    """Add the subcommands to the parser."""
    predict = sub.add_parser("predict", parents=[common], help="predict the matrix from spectra and optics",
                             description="Predict the bleed-through matrix from a description of labels and optics.")
    predict.add_argument("--config", required=True, metavar="DESCRIPTION.toml", help="the description file")
    predict.add_argument("-o", "--output", required=True, metavar="PREDICTED.json", help="the matrix file to write")
    predict.add_argument("--acquisition", choices=["sequential", "simultaneous", "grouped"],
                         help="acquisition mode (default: the description's)")
    predict.add_argument("--plot", metavar="SPECTRA.png", help="also draw the spectra and filter bands")
    predict.set_defaults(run=run_predict)
    compare = sub.add_parser("compare", parents=[common], help="compare a measured with a predicted matrix",
                             description="Compare a measured matrix with a predicted one, coefficient by coefficient.")
    compare.add_argument("measured", metavar="MEASURED.json")
    compare.add_argument("predicted", metavar="PREDICTED.json")
    compare.add_argument("-o", "--output", required=True, metavar="OUTDIR", help="folder for the table and plots")
    compare.add_argument("--config", metavar="DESCRIPTION.toml", help="also plot the described spectra")
    compare.add_argument("--tolerance", type=float, default=0.25,
                         help="model tolerance, relative (0.25: the prediction may be off by 25 %%)")
    compare.set_defaults(run=run_compare)
    plan = sub.add_parser("plan", parents=[common], help="rank candidate set-ups by leakage and noise penalty",
                          description="Rank candidate set-ups (description files, acquisition modes) by their "
                                      "largest predicted leak, then by their worst noise penalty.")
    plan.add_argument("configs", nargs="+", metavar="DESCRIPTION.toml")
    plan.add_argument("--acquisition", choices=["both", "sequential", "simultaneous", "grouped"], default="both",
                      help="modes to rank for each description (both)")
    plan.set_defaults(run=run_plan)


def _prediction_summary(prediction) -> str:
    from ..report.summary import matrix_summary, table

    matrix = prediction.matrix
    parts = [matrix_summary(matrix), "", "Split: cross-excitation factor x emission bleed-through factor"]
    rows = [["channel \\ label", *matrix.labels]]
    for c, channel in enumerate(matrix.channels):
        rows.append([channel, *(f"{prediction.excitation_factor[c, k]:.4f} x {prediction.emission_factor[c, k]:.4f}"
                                for k in range(len(matrix.labels)))])
    parts += [table(rows), "", "Relative brightness in the primary channel: "
              + ", ".join(f"{label} {value:.2f}" for label, value in prediction.relative_brightness.items()),
              f"Acquisition: {matrix.qc['acquisition']}"]
    return "\n".join(parts)


def run_predict(args) -> int:
    from ..optics.description import load_description
    from ..optics.prediction import predict
    from ..report.plots import save_png, spectra_figure

    output = check_output(args.output, [args.config])
    plot = check_output(args.plot, [args.config, args.output], "--plot") if args.plot else None
    description = load_description(args.config)
    prediction = predict(description, args.acquisition)
    prediction.matrix.save(output)
    if plot is not None:
        save_png(spectra_figure(description), plot)
    if not args.quiet:
        print(_prediction_summary(prediction))
        print(f"\nwrote {output}" + (f" and {plot}" if plot else ""))
    return 0


def run_compare(args) -> int:
    from ..matrix import load_matrix
    from ..optics.comparison import compare, write_comparison
    from ..report.plots import comparison_pngs
    from ..report.summary import comparison_rows, table

    if not 0 <= args.tolerance < float("inf"):
        raise InputError(f"--tolerance {args.tolerance}: give a finite relative tolerance of 0 or more (0.25)")
    outdir = check_output_folder(args.output, [args.measured, args.predicted, args.config])
    measured = load_matrix(args.measured)
    predicted = load_matrix(args.predicted)
    description = None
    if args.config:
        from ..optics.description import load_description

        description = load_description(args.config)
    comparison = compare(measured, predicted, tolerance=args.tolerance, where=f"{args.measured} vs {args.predicted}")
    # Every figure is drawn before any file is written: all or none.
    paths = write_comparison(comparison, outdir, extra=comparison_pngs(measured, predicted, comparison, description))
    if not args.quiet:
        print(table(comparison_rows(comparison)))
        print()
        print(comparison.summary)
        print(f"\nwrote {paths['json']}, {paths['csv']} and plots in {outdir}")
    return 0


def run_plan(args) -> int:
    from ..optics.description import load_description
    from ..optics.prediction import rank_setups
    from ..report.summary import table

    candidates = []
    for path in args.configs:
        description = load_description(path)
        modes = ["sequential", "simultaneous"] if args.acquisition == "both" else [args.acquisition]
        for mode in modes:
            candidates.append((Path(path).name, description, mode or None))
    ranked = rank_setups(candidates)
    rows = [["rank", "set-up", "acquisition", "largest leak", "into channel", "of label", "worst noise penalty",
             "condition"]]
    for i, row in enumerate(ranked, start=1):
        rows.append([str(i), row["name"], row["acquisition"], f"{row['largest_leak']:.4f}", row["leak_channel"],
                     row["leak_label"], f"{row['largest_noise_penalty']:.2f} ({row['penalty_label']})",
                     f"{row['condition_number']:.2f}"])
    print(table(rows))
    return 0

