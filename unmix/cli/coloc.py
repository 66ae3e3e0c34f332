"""``unmix coloc``: colocalization of label pairs before and after unmixing, with verdicts."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..coloc.verdict import ROUNDS
from ..errors import InputError
from .args import (add_image_options, add_registration_option, add_settings_option, check_output, name_list,
                   registration_from)


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    coloc = sub.add_parser("coloc", parents=[common], help="colocalization before and after unmixing, with verdicts",
                           description="Measure colocalization of label pairs before and after unmixing and say "
                                       "whether the overlap is real or bleed-through.")
    coloc.add_argument("inputs", nargs="+", metavar="INPUT", help="raw multichannel plane(s) (C, Y, X)")
    coloc.add_argument("--matrix", required=True, metavar="MATRIX.json",
                       help="the matrix file from unmix measure (or unmix predict)")
    coloc.add_argument("--labels", action="append", required=True, metavar="A,B", help="a pair of labels; repeatable")
    coloc.add_argument("--mask", metavar="PATH", help="measure only where this image is non-zero")
    coloc.add_argument("--objects", metavar="PATH", help="label image: one result per object (cell)")
    coloc.add_argument("--unmixed", metavar="PATH",
                       help="non-negative abundances from unmix apply, for the figures beside the verdict "
                            "(else unmixed here)")
    coloc.add_argument("--flat", metavar="estimate|PATH",
                       help="divide each channel by its flat field before unmixing: an image with one flat per "
                            "channel, or 'estimate' for a per-channel illumination estimate from all INPUTs "
                            "(at least 3)")
    coloc.add_argument("--rounds", type=int, default=ROUNDS,
                       help=f"randomisation shifts ({ROUNDS}; all allowed shifts when there are fewer)")
    coloc.add_argument("--seed", type=int, default=0, help="randomisation and matrix-draw seed (0)")
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
    add_settings_option(coloc)
    add_registration_option(coloc)
    add_image_options(coloc)
    coloc.set_defaults(run=run_coloc)


def _plane(path: str, args, names=None, what: str = "image") -> np.ndarray:
    """One plane (C, Y, X) of a file, channels `names` in that order."""
    from ..io.images import read_image

    image = read_image(path, axes=args.axes, channel_names=name_list(args.channel_names) if what == "image" else None)
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
    from ..io.images import read_image

    data = np.asarray(read_image(path).data)
    data = data[0] if data.ndim == 3 and data.shape[0] == 1 else data
    if data.shape != tuple(shape):
        raise InputError(f"{what} {path}: has shape {data.shape}, the image {tuple(shape)}; give one of the same size")
    return data


def _psf_pixels(args, path: str) -> int:
    """The PSF's full width at half maximum in pixels, 0.51 x wavelength / NA (common practice)."""
    import math

    from ..io.images import read_image

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


def _flats(args, matrix, inputs) -> np.ndarray | None:
    """Per-channel flat fields: from the --flat image, or estimated from every input of the batch."""
    if not args.flat:
        return None
    if args.flat != "estimate":
        return _plane(args.flat, args, list(matrix.channels), "flat-field image")
    from ..coloc.illumination import illumination_estimate

    if len(inputs) < 3:
        raise InputError(f"--flat estimate: needs at least 3 INPUT images of the batch (got {len(inputs)}): "
                         "structures average out only over several fields; give flat-field images instead")
    planes = [_plane(path, args, list(matrix.channels)) for path in inputs]
    if len({p.shape for p in planes}) > 1:
        raise InputError("--flat estimate: the INPUT images differ in size; give flat-field images instead")
    try:
        return illumination_estimate(planes, matrix.background)
    except ValueError as exc:
        raise InputError(f"--flat estimate: {exc}; give flat-field images instead") from None


def run_coloc(args) -> int:
    import csv
    import io
    import json

    from ..coloc.verdict import VERDICTS, judge_pair, prepare_image, warn_about_matrix
    from ..io.atomic import write_text_atomic
    from ..matrix import load_matrix
    from ..report.summary import table

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
    if not -1 <= args.min_r <= 1:
        raise InputError(f"--min-r {args.min_r}: give a correlation between -1 and 1, e.g. 0.1")
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
            outputs[option] = check_output(value, inputs, option)
    warn_about_matrix(matrix)
    from ..io.acquisition import check_settings

    check_settings(matrix.provenance.get("acquisition"), args.inputs, strict=args.strict_settings,
                   reference_name=args.matrix, channels=matrix.channels, channel_names=name_list(args.channel_names))
    flats = _flats(args, matrix, args.inputs)
    registration = registration_from(args)
    results = []
    for path in args.inputs:
        raw = _plane(path, args, list(matrix.channels))
        if registration is not None:
            from ..measure.registration import register_plane

            registration.check(matrix.channels, raw.shape, path)
            raw = register_plane(raw, matrix.channels, registration, matrix.saturation)
        unmixed = _plane(args.unmixed, args, list(matrix.labels), "unmixed image") if args.unmixed else None
        image = prepare_image(raw, matrix, flat=flats, unmixed=unmixed, seed=args.seed)
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
        for pair in pairs:
            for object_id, region in regions:
                result = judge_pair(image, pair, mask=region, rounds=args.rounds, seed=args.seed, alpha=args.alpha,
                                    min_r=args.min_r, thresholds=thresholds, threshold_method=args.threshold_method,
                                    min_shift=min_shift)
                histogram = None
                if args.histograms:
                    from ..coloc.verdict import pair_planes
                    from ..io.atomic import safe_file_name
                    from ..report.plots import coloc_histograms, save_png

                    folder = Path(args.histograms)
                    folder.mkdir(parents=True, exist_ok=True)
                    before_a, before_b, after_a, after_b = pair_planes(image, pair)
                    keep = image.valid if region is None else image.valid & region
                    stem = safe_file_name(Path(path).name.split(".")[0] + f"_{pair[0]}-{pair[1]}" + (
                        f"_object{object_id}" if object_id is not None else ""))
                    histogram = save_png(coloc_histograms((before_a[keep], before_b[keep]),
                                                          (after_a[keep], after_b[keep]), result),
                                         folder / f"{stem}.png").resolve()
                results.append((path, object_id, result, histogram))
    records = []
    for path, object_id, result, histogram in results:
        record = result.to_dict()
        record.update({"image": str(path), "object": object_id, "matrix_sha256": matrix.sha256()})
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
                        + [f"after_{k}" for k in keys] + ["after_pearson_noise_corrected", "after_corrected_low",
                                                           "after_corrected_high", "inflation", "saturated_pixels",
                                                           "flat_field", "noise_model", "note"])

        def blank(value):
            return "" if value is None else value

        for record in records:
            interval = record["after"]["pearson_noise_corrected_interval"] or ["", ""]
            writer.writerow([record["image"], *record["pair"], blank(record["object"]), record["verdict"]]
                            + [blank(record["before"][k]) for k in keys] + [blank(record["after"][k]) for k in keys]
                            + [blank(record["after"]["pearson_noise_corrected"]), *interval,
                               blank(record["inflation"]), record["saturated_pixels"], record["flat_field"],
                               record["noise_model"],
                               "; ".join(n for n in (record["before"]["note"], record["after"]["note"]) if n)])
        write_text_atomic(outputs["--csv"], out.getvalue())
    if not args.quiet:
        def cell(c):
            if c["pearson"] is None:
                return "undefined"
            return f"{c['pearson']:.3f} (p {c['p_value']:.3g})" if c["p_value"] is not None else f"{c['pearson']:.3f}"

        def corrected(c):
            if c["pearson_noise_corrected"] is None:
                return "undefined"
            interval = c["pearson_noise_corrected_interval"]
            return (f"{c['pearson_noise_corrected']:.3f}" + (f" [{interval[0]:.3f}, {interval[1]:.3f}]"
                                                             if interval else "") + f" (p {c['p_value']:.3g})")

        rows = [["image", "pair", "object", "Pearson r before", "r after, noise-corrected [95 %]", "verdict"]]
        for record in records:
            rows.append([Path(record["image"]).name, "/".join(record["pair"]),
                         "-" if record["object"] is None else str(record["object"]), cell(record["before"]),
                         corrected(record["after"]), record["verdict"]])
        print(table(rows))
        print()
        for verdict in dict.fromkeys(r["verdict"] for r in records):
            print(f"{verdict}: {VERDICTS[verdict]}")
        notes = {n for r in records for n in (r["before"]["note"], r["after"]["note"]) if n}
        for note in sorted(notes):
            print(f"note: {note}")
    return 0
