"""``unmix measure``: controls -> the bleed-through matrix file."""

from __future__ import annotations

from ..errors import InputError
from .args import (add_image_options, add_registration_option, check_output, label_paths, label_values,
                   name_list, numbers, registration_from)


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    measure = sub.add_parser("measure", parents=[common], help="measure the bleed-through matrix from controls",
                             description="Measure the bleed-through matrix from single-label control images.")
    measure.add_argument("--control", action="append", metavar="LABEL=PATH[,PATH...]", required=True,
                         help="single-label control of LABEL (several fields comma-separated); once per label")
    measure.add_argument("--unstained", metavar="PATH", help="unlabelled specimen: offset plus autofluorescence")
    measure.add_argument("--dark", metavar="PATH", help="dark frame: camera offset only")
    measure.add_argument("--saturation", metavar="V[,V...]", help="saturation level, one or one per channel")
    measure.add_argument("--primary", action="append", metavar="LABEL=CHANNEL",
                         help="primary channel of LABEL (default: its brightest channel)")
    measure.add_argument("--allow-nonfinite", action="store_true", help="exclude NaN/inf pixels instead of refusing")
    add_registration_option(measure)
    measure.add_argument("--autofluorescence", metavar="NAME",
                         help="add the cells' autofluorescence, measured on --unstained, as a label NAME (needs "
                              "one channel more than the labels)")
    measure.add_argument("--autofluorescence-mask", metavar="PATH",
                         help="the cells of --unstained (non-zero pixels); default: thresholded")
    measure.add_argument("-o", "--output", required=True, metavar="MATRIX.json", help="the matrix file to write")
    measure.add_argument("--csv", metavar="TABLE.csv", help="also write the coefficients and QC as CSV")
    measure.add_argument("--bootstrap", type=int, default=1000, metavar="N", help="bootstrap replicates (1000)")
    measure.add_argument("--block-size", type=int, default=32, metavar="PX",
                         help="side of the resampled spatial blocks in pixels (32)")
    measure.add_argument("--min-snr", type=float, default=3.0,
                         help="signal pixels: neighbour mean above background by this many noise SDs (3)")
    measure.add_argument("--max-saturated-percent", type=float, default=25.0, metavar="P",
                         help="refuse a control with more than P %% of its signal pixels saturated (25)")
    measure.add_argument("--seed", type=int, default=0, help="bootstrap seed (0)")
    add_image_options(measure)
    measure.set_defaults(run=run_measure)


# More replicates than this only cost memory and time: with 10,000 the Monte Carlo error of a
# 95 % interval's end points is already well below the sampling error (common practice).
MAX_BOOTSTRAP = 100_000


def run_measure(args) -> int:
    from ..measure.controls import MeasureSettings, measure_files
    from ..report.summary import matrix_summary, spreading_table

    controls = label_paths(args.control, "--control")
    if not controls:
        raise InputError("--control: give at least one LABEL=PATH")
    inputs = [p for paths in controls.values() for p in paths]
    inputs += [p for p in (args.unstained, args.dark, args.registration, args.autofluorescence_mask) if p]
    if args.autofluorescence_mask and not args.autofluorescence:
        raise InputError("--autofluorescence-mask: give it with --autofluorescence NAME")
    output = check_output(args.output, inputs)
    csv_path = check_output(args.csv, inputs, "--csv") if args.csv else None
    if csv_path is not None and csv_path.resolve() == output.resolve():
        raise InputError(f"--csv {args.csv}: is the same file as -o; choose another name")
    if not 0 < args.bootstrap <= MAX_BOOTSTRAP:
        raise InputError(f"--bootstrap {args.bootstrap}: give between 100 and {MAX_BOOTSTRAP} replicates")
    if args.seed < 0:
        raise InputError(f"--seed {args.seed}: give a seed of 0 or more")
    if not 0 < args.max_saturated_percent <= 100:
        raise InputError(f"--max-saturated-percent {args.max_saturated_percent}: give a percentage above 0, "
                         "at most 100")
    try:
        settings = MeasureSettings(n_boot=args.bootstrap, block_size=args.block_size, seed=args.seed,
                                   min_snr=args.min_snr,
                                   max_saturated_fraction=args.max_saturated_percent / 100)
    except ValueError as exc:
        raise InputError(f"measure options: {exc}") from None
    matrix = measure_files(
        controls, unstained=args.unstained, dark=args.dark, registration=registration_from(args),
        autofluorescence=args.autofluorescence, autofluorescence_mask=args.autofluorescence_mask,
        saturation=numbers(args.saturation, "--saturation"),
        primary=label_values(args.primary, "--primary"), allow_nonfinite=args.allow_nonfinite,
        settings=settings, axes=args.axes, channel_names=name_list(args.channel_names),
    )
    matrix.save(output)
    if csv_path is not None:
        matrix.save_csv(csv_path)
    if not args.quiet:
        print(matrix_summary(matrix, flags=False))
        if matrix.noise_model is not None:
            print(spreading_table(matrix))
        print(f"\nwrote {output}" + (f" and {csv_path}" if csv_path else ""))
    return 0

