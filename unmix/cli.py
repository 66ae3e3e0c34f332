"""The ``unmix`` command line: subcommands that translate arguments into library calls.

Exit codes: 0 success, 2 bad input (one ``error:`` line on stderr, naming the
file or option and the fix; ``warning:`` lines may precede it), 1 internal
failure. ``--debug`` shows tracebacks. Heavy libraries are imported inside
the subcommands, so ``unmix --help`` starts at once.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import traceback
import warnings
from pathlib import Path

import numpy as np

from ._version import __version__
from .errors import InputError


class _Parser(argparse.ArgumentParser):
    """argparse with the contract's one-line error and exit code 2."""

    def error(self, message):
        raise InputError(f"{self.prog}: {message}; see '{self.prog} --help'")


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _show_warning(message, category, filename, lineno, file=None, line=None):
    print(f"warning: {_one_line(message)}", file=sys.stderr)


class _WarningLines(logging.Handler):
    def emit(self, record):
        print(f"warning: {record.name}: {_one_line(record.getMessage())}", file=sys.stderr)


# --- argument helpers -------------------------------------------------------

def _label_paths(values: list[str], option: str) -> dict[str, list[str]]:
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


def _label_values(values: list[str], option: str) -> dict[str, str]:
    result = {}
    for value in values or []:
        label, sep, target = value.partition("=")
        if not sep or not label.strip() or not target.strip():
            raise InputError(f"{option} {value!r}: write it as LABEL=CHANNEL")
        if label.strip() in result:
            raise InputError(f"{option}: label {label.strip()!r} is given twice; give it once")
        result[label.strip()] = target.strip()
    return result


def _numbers(text: str | None, option: str):
    if text is None:
        return None
    try:
        values = [float(v) for v in text.split(",")]
    except ValueError:
        raise InputError(f"{option} {text!r}: give one number, or one per channel separated by commas") from None
    if not all(v > 0 and v < float("inf") for v in values):
        raise InputError(f"{option} {text!r}: levels must be positive finite numbers")
    return values[0] if len(values) == 1 else values


def _names(text: str | None):
    return None if text is None else [n.strip() for n in text.split(",")]


def _check_output(path: str, inputs, option: str = "-o") -> Path:
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


def _add_image_options(parser):
    parser.add_argument("--axes", help="axis letters of the stored arrays, e.g. ZCYX (overrides metadata)")
    parser.add_argument("--channel-names", help="comma-separated channel names (overrides metadata)")


# --- subcommands ------------------------------------------------------------

def _measure(args) -> int:
    from .measure import MeasureSettings, measure_files
    from .summary import matrix_summary

    controls = _label_paths(args.control, "--control")
    if not controls:
        raise InputError("--control: give at least one LABEL=PATH")
    inputs = [p for paths in controls.values() for p in paths]
    inputs += [p for p in (args.unstained, args.dark) if p]
    output = _check_output(args.output, inputs)
    csv_path = _check_output(args.csv, inputs, "--csv") if args.csv else None
    if csv_path is not None and csv_path.resolve() == output.resolve():
        raise InputError(f"--csv {args.csv}: is the same file as -o; choose another name")
    try:
        settings = MeasureSettings(n_boot=args.bootstrap, block_size=args.block_size, seed=args.seed,
                                   min_snr=args.min_snr,
                                   max_saturated_fraction=args.max_saturated_percent / 100)
    except ValueError as exc:
        raise InputError(f"measure options: {exc}") from None
    matrix = measure_files(
        controls, unstained=args.unstained, dark=args.dark,
        saturation=_numbers(args.saturation, "--saturation"),
        primary=_label_values(args.primary, "--primary"), allow_nonfinite=args.allow_nonfinite,
        settings=settings, axes=args.axes, channel_names=_names(args.channel_names),
    )
    matrix.save(output)
    if csv_path is not None:
        matrix.save_csv(csv_path)
    if not args.quiet:
        print(matrix_summary(matrix))
        print(f"\nwrote {output}" + (f" and {csv_path}" if csv_path else ""))
    return 0


def _apply(args) -> int:
    import glob

    from .batch import ApplySettings, apply_matrix
    from .matrix import load_matrix
    from .summary import table

    matrix = load_matrix(args.matrix)
    inputs = []
    for pattern in args.inputs:
        # A file that exists is taken as named, even if its name holds glob characters.
        literal = Path(pattern).exists() or not any(ch in pattern for ch in "*?[")
        matches = [pattern] if literal else sorted(glob.glob(pattern))
        if not matches:
            raise InputError(f"{pattern}: matches no file; check the pattern")
        inputs += matches
    for path in inputs:
        if not Path(path).exists():
            raise InputError(f"{path}: no such file; check the path")
    outdir = Path(args.output)
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"-o {args.output}: is a file; give a folder")
    if args.method not in ("nnls", "ls"):
        raise InputError(f"--method {args.method}: use nnls or ls")
    settings = ApplySettings(method=args.method, background=args.background, overwrite=args.overwrite,
                             residual=args.residual, saturation=_numbers(args.saturation, "--saturation"),
                             axes=args.axes, channel_names=_names(args.channel_names))
    penalty = matrix.noise_penalty()
    if not args.quiet:
        print(f"Matrix {args.matrix}: {len(matrix.labels)} labels in {len(matrix.channels)} channels; "
              f"condition number {matrix.condition_number():.2f}")
        print("Noise penalty (variance factor): " + ", ".join(f"{lab} {p:.2f}" for lab, p in zip(matrix.labels, penalty)))
    if matrix.condition_number() > 100 or np.max(penalty) > 10:
        import warnings

        from .errors import InputWarning

        warnings.warn(f"{args.matrix}: labels are nearly indistinguishable (condition number "
                      f"{matrix.condition_number():.0f}); unmixed abundances will be very noisy", InputWarning,
                      stacklevel=2)

    from tqdm import tqdm

    # A progress bar only for a person watching: never in logs or pipes.
    with tqdm(unit="block", desc="unmixing", disable=args.quiet or not sys.stderr.isatty(), leave=False) as bar:
        results = apply_matrix(matrix, inputs, outdir, settings=settings, scheduler=args.scheduler,
                               progress=bar.update)
    failed = [r for r in results if r.status == "failed"]
    if not args.quiet:
        rows = [["input", "status", "output", "NaN px", "saturated px"]]
        for r in results:
            rows.append([Path(r.input).name, r.status, Path(r.output).name if r.output else "-",
                         str(r.nan_pixels), str(r.saturated_pixels)])
        print(table(rows))
    for r in failed[:-1]:
        print(f"warning: {_one_line(r.message)}", file=sys.stderr)
    if failed:
        raise InputError(f"{len(failed)} of {len(results)} inputs failed; last: {_one_line(failed[-1].message)}")
    return 0


def _prediction_summary(prediction) -> str:
    from .summary import matrix_summary, table

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


def _predict(args) -> int:
    from .optics import load_description
    from .plots import save_png, spectra_figure
    from .predict import predict

    output = _check_output(args.output, [args.config])
    plot = _check_output(args.plot, [args.config, args.output], "--plot") if args.plot else None
    description = load_description(args.config)
    prediction = predict(description, args.acquisition)
    prediction.matrix.save(output)
    if plot is not None:
        save_png(spectra_figure(description), plot)
    if not args.quiet:
        print(_prediction_summary(prediction))
        print(f"\nwrote {output}" + (f" and {plot}" if plot else ""))
    return 0


def _compare(args) -> int:
    from .compare import aligned_prediction, compare, write_comparison
    from .matrix import load_matrix
    from .plots import comparison_figure, matrices_figure, save_png, spectra_figure
    from .summary import table

    measured = load_matrix(args.measured)
    predicted = load_matrix(args.predicted)
    outdir = Path(args.output)
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"-o {args.output}: is a file; give a folder")
    description = None
    if args.config:
        from .optics import load_description

        description = load_description(args.config)
    comparison = compare(measured, predicted, tolerance=args.tolerance, where=f"{args.measured} vs {args.predicted}")
    paths = write_comparison(comparison, outdir)
    save_png(matrices_figure(measured, aligned_prediction(measured, predicted, "compare")),
             outdir / "compare-matrices.png")
    save_png(comparison_figure(comparison), outdir / "compare-scatter.png")
    if description is not None:
        save_png(spectra_figure(description), outdir / "compare-spectra.png")
    if not args.quiet:
        rows = [["channel", "label", "measured [95 % CI]", "predicted", "ratio", "verdict"]]
        for r in comparison.coefficients:
            rows.append([r["channel"], r["label"], f"{r['measured']:.4f} [{r['ci95'][0]:.4f}, {r['ci95'][1]:.4f}]",
                         f"{r['predicted']:.4f}", "-" if r["ratio"] is None else f"{r['ratio']:.2f}", r["verdict"]])
        print(table(rows))
        print()
        print(comparison.summary)
        print(f"\nwrote {paths['json']}, {paths['csv']} and plots in {outdir}")
    return 0


def _plan(args) -> int:
    from .optics import load_description
    from .predict import rank_setups
    from .summary import table

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


def _plane(path: str, args, names=None, what: str = "image") -> np.ndarray:
    """One plane (C, Y, X) of a file, channels `names` in that order."""
    from .images import read_image

    image = read_image(path, axes=args.axes, channel_names=_names(args.channel_names) if what == "image" else None)
    if names is not None:
        missing = [n for n in names if n not in image.channel_names]
        if missing:
            raise InputError(f"{path}: lacks channels {missing} (it has {list(image.channel_names)}); check the "
                             f"{what} or give --channel-names")
        image = image.select_channels(names)
    if image.axes != "CYX":
        raise InputError(f"{path}: has axes {image.axes}; coloc measures one plane (C, Y, X): save the plane "
                         "to measure, or a projection, as its own file")
    return np.asarray(image.data)


def _mask_plane(path: str, shape, what: str) -> np.ndarray:
    from .images import read_image

    data = np.asarray(read_image(path).data)
    data = data[0] if data.ndim == 3 and data.shape[0] == 1 else data
    if data.shape != tuple(shape):
        raise InputError(f"{what} {path}: has shape {data.shape}, the image {tuple(shape)}; give one of the same size")
    return data


def _psf_pixels(args, path: str) -> int:
    """The PSF's full width at half maximum in pixels, 0.51 x wavelength / NA (common practice)."""
    import math

    from .images import read_image

    try:
        aperture, wavelength = (float(v) for v in args.psf.split(","))
    except ValueError:
        raise InputError(f"--psf {args.psf!r}: give NA,WAVELENGTH_NM, e.g. 1.4,520") from None
    if not 0 < aperture < 1.7 or not 200 <= wavelength <= 1200:
        raise InputError(f"--psf {args.psf}: NA must be between 0 and 1.7 and the wavelength 200-1200 nm")
    pixel = args.pixel_um or read_image(path, axes=args.axes, lazy=True).pixel_size.get("X")
    if not pixel or pixel <= 0:
        raise InputError(f"{path}: has no pixel size; give --pixel-um for --psf")
    return max(1, math.ceil(0.51 * wavelength / 1000 / aperture / pixel))


def _coloc(args) -> int:
    import csv
    import io
    import json

    from .atomic import write_text_atomic
    from .matrix import load_matrix
    from .summary import table
    from .verdict import MATRIX_DRAWS, SIMULATIONS, analyse_pair, unmix_plane

    matrix = load_matrix(args.matrix)
    pairs = []
    for text in args.labels:
        names = [n.strip() for n in text.split(",")]
        if len(names) != 2 or not all(names) or names[0] == names[1]:
            raise InputError(f"--labels {text!r}: give two different labels as A,B")
        for name in names:
            if name not in matrix.labels:
                raise InputError(f"--labels {text}: label {name!r} is not in {args.matrix} (it has "
                                 f"{list(matrix.labels)})")
        pairs.append(tuple(names))
    if args.unmixed and len(args.inputs) > 1:
        raise InputError("--unmixed: give it with a single INPUT (or let coloc unmix each input)")
    if not 0 < args.alpha < 1:
        raise InputError(f"--alpha {args.alpha}: give a level between 0 and 1, e.g. 0.05")
    if args.rounds < 19:
        raise InputError(f"--rounds {args.rounds}: give at least 19 (p cannot go below 1 / (rounds + 1))")
    thresholds = None
    if args.thresholds:
        try:
            thresholds = tuple(float(v) for v in args.thresholds.split(","))
        except ValueError:
            thresholds = ()
        if len(thresholds) != 2 or not all(np.isfinite(thresholds)):
            raise InputError(f"--thresholds {args.thresholds!r}: give two numbers, TA,TB")
    inputs = list(args.inputs) + [p for p in (args.matrix, args.mask, args.objects, args.unmixed) if p]
    outputs = {}
    for option, value in (("--json", args.json), ("--csv", args.csv)):
        if value:
            outputs[option] = _check_output(value, inputs, option)
    results = []
    for path in args.inputs:
        raw = _plane(path, args, list(matrix.channels))
        if args.unmixed:
            unmixed = _plane(args.unmixed, args, list(matrix.labels), "unmixed image")
        else:  # once per image, shared by every pair and object
            unmixed = unmix_plane(raw, matrix)
        mask = _mask_plane(args.mask, raw.shape[1:], "--mask").astype(bool) if args.mask else None
        if mask is not None and not mask.any():
            raise InputError(f"--mask {args.mask}: selects no pixel; give a mask with pixels set")
        regions = [(None, mask)]
        if args.objects:
            objects = _mask_plane(args.objects, raw.shape[1:], "--objects")
            ids = [int(i) for i in np.unique(objects) if i > 0]
            if not ids:
                raise InputError(f"--objects {args.objects}: holds no object (all 0); give a label image")
            regions = [(i, (objects == i) if mask is None else (objects == i) & mask) for i in ids]
        min_shift = _psf_pixels(args, path) if args.psf else None
        flat = None
        if args.flat and args.flat != "estimate":
            flat = _plane(args.flat, args, list(matrix.channels), "flat-field image")
        for pair in pairs:
            for object_id, region in regions:
                quick = object_id is not None and args.quick_objects
                result = analyse_pair(raw, matrix, pair, unmixed=unmixed, mask=region, rounds=args.rounds,
                                      seed=args.seed, alpha=args.alpha, min_r=args.min_r, flat=flat,
                                      estimate_flat=args.flat == "estimate", simulations=0 if quick else SIMULATIONS,
                                      matrix_draws=0 if quick else MATRIX_DRAWS,
                                      thresholds=thresholds, threshold_method=args.threshold_method,
                                      min_shift=min_shift)
                histogram = None
                if args.histograms:
                    from .atomic import safe_file_name
                    from .plots import coloc_histograms, save_png
                    from .verdict import pair_planes

                    folder = Path(args.histograms)
                    folder.mkdir(parents=True, exist_ok=True)
                    before_a, before_b, after_a, after_b = pair_planes(raw, matrix, pair, unmixed)
                    keep = np.ones(raw.shape[1:], bool) if region is None else region
                    stem = safe_file_name(Path(path).name.split(".")[0] + f"_{pair[0]}-{pair[1]}" + (
                        f"_object{object_id}" if object_id is not None else ""))
                    histogram = save_png(coloc_histograms((before_a[keep], before_b[keep]),
                                                          (after_a[keep], after_b[keep]), result),
                                         folder / f"{stem}.png").resolve()
                results.append((path, object_id, result, histogram))
    records = []
    for path, object_id, result, histogram in results:
        record = result.to_dict()
        record.update({"image": str(path), "object": object_id})
        if histogram is not None:
            record["histogram"] = str(histogram)
        records.append(record)
    if "--json" in outputs:
        single = len(records) == 1 and records[0]["object"] is None
        write_text_atomic(outputs["--json"], json.dumps(records[0] if single else {"results": records}, indent=2,
                                                        allow_nan=False) + "\n")
    if "--csv" in outputs:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        keys = ("pearson", "p_value", "spearman", "manders_m1", "manders_m2", "icq", "overlap", "n_pixels")
        writer.writerow(["image", "label_a", "label_b", "object", "verdict"] + [f"before_{k}" for k in keys]
                        + [f"after_{k}" for k in keys] + ["after_pearson_low", "after_pearson_high",
                                                           "saturated_pixels", "flat_field", "note"])
        for record in records:
            interval = record["after_pearson_interval"] or ["", ""]
            writer.writerow([record["image"], *record["pair"], "" if record["object"] is None else record["object"],
                             record["verdict"]] + ["" if record["before"][k] is None else record["before"][k]
                                                   for k in keys]
                            + ["" if record["after"][k] is None else record["after"][k] for k in keys]
                            + [*interval, record["saturated_pixels"], record["flat_field"],
                               "; ".join(n for n in (record["before"]["note"], record["after"]["note"]) if n)])
        write_text_atomic(outputs["--csv"], out.getvalue())
    if not args.quiet:
        def cell(c):
            if c["pearson"] is None:
                return "undefined"
            return f"{c['pearson']:.3f} (p {c['p_value']:.3g})" if c["p_value"] is not None else f"{c['pearson']:.3f}"

        rows = [["image", "pair", "object", "Pearson r before", "Pearson r after", "after 95 % (matrix)", "verdict"]]
        for record in records:
            interval = record["after_pearson_interval"]
            rows.append([Path(record["image"]).name, "/".join(record["pair"]),
                         "-" if record["object"] is None else str(record["object"]), cell(record["before"]),
                         cell(record["after"]), "-" if not interval else f"{interval[0]:.3f} to {interval[1]:.3f}",
                         record["verdict"]])
        print(table(rows))
        from .verdict import VERDICTS

        print()
        for verdict in dict.fromkeys(r["verdict"] for r in records):
            print(f"{verdict}: {VERDICTS[verdict]}")
        notes = {n for r in records for n in (r["before"]["note"], r["after"]["note"]) if n}
        for note in sorted(notes):
            print(f"note: {note}")
    return 0


def _report(args) -> int:
    from .matrix import load_matrix
    from .report import build_report, load_coloc_results, write_report

    inputs = [args.matrix] + ([args.predicted] if args.predicted else []) + list(args.coloc or [])
    output = _check_output(args.output, inputs)
    if not output.name.lower().endswith((".html", ".htm")):
        raise InputError(f"-o {args.output}: the report is HTML; give a name ending in .html")
    matrix = load_matrix(args.matrix)
    predicted = load_matrix(args.predicted) if args.predicted else None
    records = [record for path in args.coloc or [] for record in load_coloc_results(path)]
    write_report(output, build_report(matrix, matrix_path=args.matrix, predicted=predicted,
                                      predicted_path=args.predicted, coloc_records=records))
    if not args.quiet:
        print(f"wrote {output}")
    return 0


def _demo(args) -> int:
    from .demo import run_demo

    run_demo(args.output)
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="unmix", description=__doc__.split("\n")[0])
    parser.add_argument("--version", action="version", version=f"unmix {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    common.add_argument("--quiet", action="store_true", help="print nothing but warnings and errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

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
    _add_image_options(measure)
    measure.set_defaults(run=_measure)

    apply = sub.add_parser("apply", parents=[common], help="unmix stacks with a matrix",
                           description="Unmix multichannel stacks by per-pixel non-negative least squares.")
    apply.add_argument("--matrix", required=True, metavar="MATRIX.json", help="measured or predicted matrix file")
    apply.add_argument("inputs", nargs="+", metavar="INPUT", help="TIFF, OME-TIFF or OME-Zarr inputs (globs allowed)")
    apply.add_argument("-o", "--output", required=True, metavar="OUTDIR", help="output folder")
    apply.add_argument("--method", default="nnls", help="nnls (default, exact non-negative) or ls (unconstrained)")
    apply.add_argument("--background", default="matrix", metavar="matrix|estimate|PATH",
                       help="background: the matrix file's (default), estimated per input, or a dark/unstained image")
    apply.add_argument("--scheduler", metavar="ADDRESS", help="run on this Dask distributed scheduler")
    apply.add_argument("--overwrite", action="store_true", help="replace outputs made from another matrix or input")
    apply.add_argument("--residual", action="store_true", help="also write the per-pixel misfit (RMS residual)")
    apply.add_argument("--saturation", metavar="V[,V...]", help="saturation level, one or one per channel")
    _add_image_options(apply)
    apply.set_defaults(run=_apply)

    coloc = sub.add_parser("coloc", parents=[common], help="colocalization before and after unmixing, with verdicts",
                           description="Measure colocalization of label pairs before and after unmixing and say "
                                       "whether the overlap is real or bleed-through.")
    coloc.add_argument("inputs", nargs="+", metavar="INPUT", help="raw multichannel plane(s) (C, Y, X)")
    coloc.add_argument("--matrix", required=True, metavar="MATRIX.json")
    coloc.add_argument("--labels", action="append", required=True, metavar="A,B", help="a pair of labels; repeatable")
    coloc.add_argument("--mask", metavar="PATH", help="measure only where this image is non-zero")
    coloc.add_argument("--objects", metavar="PATH", help="label image: one result per object (cell)")
    coloc.add_argument("--unmixed", metavar="PATH", help="abundances from unmix apply (else unmixed here)")
    coloc.add_argument("--flat", metavar="estimate|PATH", help="flat-field first: a flat image per channel, or "
                                                                "'estimate' for a smooth illumination estimate")
    coloc.add_argument("--rounds", type=int, default=200, help="randomisation rounds (200)")
    coloc.add_argument("--seed", type=int, default=0, help="randomisation and simulation seed (0)")
    coloc.add_argument("--alpha", type=float, default=0.05, help="significance level (0.05)")
    coloc.add_argument("--min-r", type=float, default=0.1, help="smallest Pearson r that counts as overlap (0.1)")
    coloc.add_argument("--thresholds", metavar="TA,TB", help="Manders thresholds of A and B (background-subtracted "
                                                               "intensity in their primary channels); default Costes")
    coloc.add_argument("--threshold-method", choices=["costes", "otsu"], default="costes",
                       help="automatic thresholds when --thresholds is not given (costes)")
    coloc.add_argument("--psf", metavar="NA,WAVELENGTH_NM",
                       help="shift the randomisation by at least the PSF size 0.51 x wavelength / NA (needs the "
                            "image's pixel size, or --pixel-um); the correlation length is used when longer")
    coloc.add_argument("--pixel-um", type=float, help="pixel size in micrometres (else from the image metadata)")
    coloc.add_argument("--json", metavar="OUT.json", help="write the results as JSON")
    coloc.add_argument("--csv", metavar="OUT.csv", help="write one row per image x pair (x object)")
    coloc.add_argument("--histograms", metavar="DIR", help="write 2-D histograms before/after as PNG")
    coloc.add_argument("--quick-objects", action="store_true",
                       help="with --objects: per object, skip the bleed-through-only simulation and the "
                            "matrix-uncertainty interval (much faster with many objects)")
    _add_image_options(coloc)
    coloc.set_defaults(run=_coloc)

    predict = sub.add_parser("predict", parents=[common], help="predict the matrix from spectra and optics",
                             description="Predict the bleed-through matrix from a description of labels and optics.")
    predict.add_argument("--config", required=True, metavar="DESCRIPTION.toml", help="the description file")
    predict.add_argument("-o", "--output", required=True, metavar="PREDICTED.json", help="the matrix file to write")
    predict.add_argument("--acquisition", choices=["sequential", "simultaneous", "tracks"],
                         help="acquisition mode (default: the description's)")
    predict.add_argument("--plot", metavar="SPECTRA.png", help="also draw the spectra and filter bands")
    predict.set_defaults(run=_predict)

    compare = sub.add_parser("compare", parents=[common], help="compare a measured with a predicted matrix",
                             description="Compare a measured matrix with a predicted one, coefficient by coefficient.")
    compare.add_argument("measured", metavar="MEASURED.json")
    compare.add_argument("predicted", metavar="PREDICTED.json")
    compare.add_argument("-o", "--output", required=True, metavar="OUTDIR", help="folder for the table and plots")
    compare.add_argument("--config", metavar="DESCRIPTION.toml", help="also plot the described spectra")
    compare.add_argument("--tolerance", type=float, default=0.25,
                         help="model tolerance, relative (0.25: the prediction may be off by 25 %%)")
    compare.set_defaults(run=_compare)

    plan = sub.add_parser("plan", parents=[common], help="rank candidate set-ups by leakage and noise penalty",
                          description="Rank candidate set-ups (description files, acquisition modes) by their "
                                      "largest predicted leak, then by their worst noise penalty.")
    plan.add_argument("configs", nargs="+", metavar="DESCRIPTION.toml")
    plan.add_argument("--acquisition", choices=["both", "sequential", "simultaneous", "tracks"], default="both",
                      help="modes to rank for each description (both)")
    plan.set_defaults(run=_plan)

    report = sub.add_parser("report", parents=[common], help="one self-contained HTML report",
                            description="Write one self-contained HTML report: the matrix, measured versus "
                                        "predicted, and colocalization verdicts.")
    report.add_argument("--matrix", required=True, metavar="MATRIX.json")
    report.add_argument("--predicted", metavar="PREDICTED.json", help="add measured versus predicted")
    report.add_argument("--coloc", action="append", metavar="COLOC.json", help="results of unmix coloc --json")
    report.add_argument("-o", "--output", required=True, metavar="REPORT.html")
    report.set_defaults(run=_report)

    demo = sub.add_parser("demo", parents=[common], help="run the whole job on the shipped demo scenario",
                          description="Run the tool on the shipped demo scenario and print where the results are.")
    demo.add_argument("-o", "--output", default="unmix-demo", metavar="OUTDIR", help="output folder (unmix-demo)")
    demo.set_defaults(run=_demo)
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
        print(f"error: {_one_line(exc)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("error: interrupted; outputs not finished were not written", file=sys.stderr)
        return 130
    except SystemExit as exc:  # --help and --version
        return int(exc.code or 0)
    except Exception as exc:  # noqa: BLE001 - the last line of defence
        if debug:
            traceback.print_exc()
        print(f"internal error: {type(exc).__name__}: {_one_line(exc)}; rerun with --debug and report it",
              file=sys.stderr)
        return 1
    finally:
        logging.getLogger().removeHandler(handler)


if __name__ == "__main__":
    raise SystemExit(main())
