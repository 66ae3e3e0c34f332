"""``unmix coloc``: colocalization of label pairs before and after unmixing, with verdicts.

Planes, z-stacks (measured over voxels, never as a projection) and time series
(a verdict per time point and a summary over time).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from ..coloc import ROUNDS
from ..errors import InputError, InputWarning
from .args import (add_image_options, add_registration_option, add_settings_option, check_output, name_list,
                   registration_from)


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    coloc = sub.add_parser("coloc", parents=[common], help="colocalization before and after unmixing, with verdicts",
                           description="Measure colocalization of label pairs before and after unmixing and say "
                                       "whether the overlap is real or bleed-through. Planes, z-stacks (in 3-D, "
                                       "over voxels) and time series.")
    coloc.add_argument("inputs", nargs="+", metavar="INPUT",
                       help="raw multichannel images: a plane (C, Y, X), a z-stack (C, Z, Y, X) or a time series")
    coloc.add_argument("--matrix", required=True, metavar="MATRIX.json",
                       help="the matrix file from unmix measure (or unmix predict)")
    coloc.add_argument("--labels", action="append", required=True, metavar="A,B", help="a pair of labels; repeatable")
    coloc.add_argument("--mask", metavar="PATH",
                       help="measure only where this image is non-zero (a plane for every plane, or a 3-D mask)")
    coloc.add_argument("--objects", metavar="PATH", help="label image (2-D or 3-D): one result per object (cell)")
    coloc.add_argument("--unmixed", metavar="PATH",
                       help="non-negative abundances from unmix apply, for the figures beside the verdict "
                            "(else unmixed here)")
    coloc.add_argument("--planes", metavar="FIRST:LAST", help="z-stacks: measure planes FIRST to LAST (0-based, "
                                                              "both included)")
    coloc.add_argument("--plane", type=int, metavar="Z", help="z-stacks: measure this one plane, in 2-D")
    coloc.add_argument("--frames", metavar="FIRST:LAST", help="time series: measure time points FIRST to LAST "
                                                              "(0-based, both included)")
    coloc.add_argument("--bleach-limit", type=float, default=0.2, metavar="F",
                       help="time series: flag a label whose signal falls by more than this fraction (0.2)")
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
    coloc.add_argument("--csv", metavar="OUT.csv", help="write one row per image x pair (x object, x plane range, "
                                                        "x time point)")
    coloc.add_argument("--histograms", metavar="DIR", help="write 2-D histograms before/after as PNG")
    add_settings_option(coloc)
    add_registration_option(coloc)
    add_image_options(coloc)
    coloc.set_defaults(run=run_coloc)


def _range(text: str | None, option: str, size: int, what: str) -> range | None:
    """FIRST:LAST (both included) within 0..size-1; None when not given."""
    if text is None:
        return None
    try:
        first, last = (int(v) for v in text.split(":"))
    except ValueError:
        raise InputError(f"{option} {text!r}: give FIRST:LAST, e.g. 0:9") from None
    if not 0 <= first <= last < size:
        raise InputError(f"{option} {text}: the data have {size} {what} (0 to {size - 1}); give a range inside them")
    return range(first, last + 1)


class _Series:
    """One input read lazily (its file stays open in `files` until the command ends): its frames,
    each (C, Z, Y, X), with the planes chosen."""

    def __init__(self, files, path: str, args, names, what: str = "image"):
        from ..io.images import open_images

        images = files.enter_context(open_images(
            path, axes=args.axes, channel_names=name_list(args.channel_names) if what == "image" else None))
        image = images[0]
        missing = [n for n in names if n not in image.channel_names]
        if missing:
            raise InputError(f"{path}: lacks channels {missing} (it has {list(image.channel_names)}); check the "
                             f"{what} or give --channel-names")
        image = image.select_channels(names)
        data = image.data
        if "Z" not in image.axes:
            data = data[..., None, :, :] if "T" not in image.axes else data[:, :, None]
        if "T" not in image.axes:
            data = data[None]
        self.path, self.image, self.data = path, image, data  # (T, C, Z, Y, X)
        n_frames, _, n_planes = data.shape[:3]
        self.has_time = "T" in image.axes
        self.frames = _range(getattr(args, "frames", None), "--frames", n_frames, "time points") or range(n_frames)
        if not self.has_time and getattr(args, "frames", None) is None:
            self.frames = range(1)
        self.planes = _range(getattr(args, "planes", None), "--planes", n_planes, "planes") or range(n_planes)
        if getattr(args, "plane", None) is not None:
            if not 0 <= args.plane < n_planes:
                raise InputError(f"--plane {args.plane}: the data have {n_planes} planes (0 to {n_planes - 1}); "
                                 "give one inside them")
            self.planes = range(args.plane, args.plane + 1)
        self.z_spacing = image.pixel_size.get("Z")

    def frame(self, t: int):
        return self.data[t][:, self.planes.start:self.planes.stop]


def _region_image(path: str, option: str, series: _Series, integer: bool):
    """A mask or label image as (Y, X) or (Z, Y, X) over the chosen planes."""
    from ..io.images import read_image

    data = np.asarray(read_image(path, mask=True).data)
    if data.ndim >= 3 and data.shape[0] == 1:
        data = data[0]  # a single-channel file
    if integer and data.dtype.kind not in "uib":
        if not np.all(data == np.round(data)):
            raise InputError(f"{option} {path}: holds non-integer values; an object (label) image holds whole "
                             "numbers, one per object")
        data = data.astype(np.int64)
    planes = series.data.shape[2]
    shape = tuple(series.data.shape[-2:])
    if data.shape == shape:
        return data
    if data.shape == (planes,) + shape:
        return data[series.planes.start:series.planes.stop]
    expected = shape if planes == 1 else f"{shape} or {(planes,) + shape}"
    raise InputError(f"{option} {path}: has shape {data.shape}; the image's planes are {expected}: give one of the "
                     "same size")


# Each object is measured in its bounding box widened by this many pixels in Y and X: the toroidal
# shifts of its randomisation move its surroundings, not the whole field (a rule of this tool).
OBJECT_MARGIN = 16


class _ObjectRegion:
    """One object of a label image: its box (planes, rows, columns) and its mask inside the box."""

    def __init__(self, objects, mask, label: int, box: tuple):
        self.objects, self.mask, self.label, self.box = objects, mask, label, box

    def __call__(self, shape) -> tuple:
        """(box as (planes, rows, columns) slices of an image of `shape` (Z, Y, X), mask in the box)."""
        rows, columns = (slice(max(s.start - OBJECT_MARGIN, 0), min(s.stop + OBJECT_MARGIN, n))
                         for s, n in zip(self.box[-2:], shape[-2:]))
        planes = self.box[0] if len(self.box) == 3 else slice(0, shape[0])
        inside = self.objects[(planes, rows, columns) if self.objects.ndim == 3 else (rows, columns)] == self.label
        if self.mask is not None:
            inside = inside & self.mask[(planes, rows, columns) if self.mask.ndim == 3 else (rows, columns)]
        if inside.ndim == 2:
            inside = np.broadcast_to(inside, (planes.stop - planes.start,) + inside.shape)
        return (planes, rows, columns), inside


def _object_regions(objects, mask, path) -> list:
    """(object id, region) for every object, each found by one pass (scipy.ndimage.find_objects)."""
    from scipy import ndimage

    if objects.min() < 0:
        raise InputError(f"--objects {path}: holds negative values; an object (label) image holds 0 for no object "
                         "and a positive whole number per object")
    boxes = ndimage.find_objects(objects)
    regions = [(label + 1, _ObjectRegion(objects, mask, label + 1, box)) for label, box in enumerate(boxes)
               if box is not None]
    if not regions:
        raise InputError(f"--objects {path}: holds no object (all 0); give a label image")
    return regions


def _psf_pixels(args, series: _Series) -> int:
    """The PSF's full width at half maximum in pixels, 0.51 x wavelength / NA (common practice)."""
    import math

    try:
        aperture, wavelength = (float(v) for v in args.psf.split(","))
    except ValueError:
        raise InputError(f"--psf {args.psf!r}: give NA,WAVELENGTH_NM, e.g. 1.4,520") from None
    if not 0 < aperture < 1.7 or not 200 <= wavelength <= 1200:
        raise InputError(f"--psf {args.psf}: NA must be between 0 and 1.7 and the wavelength 200-1200 nm")
    pixel = args.pixel_um or series.image.pixel_size.get("X")
    if not pixel or pixel <= 0:
        raise InputError(f"{series.path}: has no pixel size; give --pixel-um for --psf")
    return max(1, math.ceil(0.51 * wavelength / 1000 / aperture / pixel))


def _flats(files, args, matrix, inputs) -> np.ndarray | None:
    """Per-channel flat fields (C, Y, X): from the --flat image, or estimated from every input of the batch."""
    if not args.flat:
        return None
    if args.flat != "estimate":
        flat = _Series(files, args.flat, args, list(matrix.channels), "flat-field image")
        return np.asarray(flat.frame(0))[:, 0]
    from ..coloc.illumination import illumination_estimate

    if len(inputs) < 3:
        raise InputError(f"--flat estimate: needs at least 3 INPUT images of the batch (got {len(inputs)}): "
                         "structures average out only over several fields; give flat-field images instead")
    fields = []
    for path in inputs:
        series = _Series(files, path, args, list(matrix.channels))
        frame = series.frame(series.frames[0])
        fields.append(np.asarray(frame[:, frame.shape[1] // 2]))
    if len({f.shape for f in fields}) > 1:
        raise InputError("--flat estimate: the INPUT images differ in size; give flat-field images instead")
    try:
        return illumination_estimate(fields, matrix.background)
    except ValueError as exc:
        raise InputError(f"--flat estimate: {exc}; give flat-field images instead") from None


def _check_options(args, matrix) -> tuple[list, tuple | None]:
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
    if args.plane is not None and args.planes is not None:
        raise InputError("--plane and --planes: give one of them")
    if not 0 < args.alpha < 1:
        raise InputError(f"--alpha {args.alpha}: give a level between 0 and 1, e.g. 0.05")
    if not -1 <= args.min_r <= 1:
        raise InputError(f"--min-r {args.min_r}: give a correlation between -1 and 1, e.g. 0.1")
    if not 0 < args.bleach_limit < 1:
        raise InputError(f"--bleach-limit {args.bleach_limit}: give a fraction between 0 and 1, e.g. 0.2")
    if args.rounds < 19:
        raise InputError(f"--rounds {args.rounds}: give at least 19 (p cannot go below 1 / (rounds + 1))")
    if args.seed < 0:
        raise InputError(f"--seed {args.seed}: give a whole number of 0 or more")
    if args.pixel_um is not None and not (0 < args.pixel_um < float("inf")):
        raise InputError(f"--pixel-um {args.pixel_um}: give the pixel size in micrometres, a positive number")
    thresholds = None
    if args.thresholds:
        try:
            thresholds = tuple(float(v) for v in args.thresholds.split(","))
        except ValueError:
            thresholds = ()
        if len(thresholds) != 2 or not all(np.isfinite(thresholds)):
            raise InputError(f"--thresholds {args.thresholds!r}: give two numbers, TA,TB")
    return pairs, thresholds


def run_coloc(args) -> int:
    import contextlib

    with contextlib.ExitStack() as files:
        return _run(files, args)


def _run(files, args) -> int:
    import json

    from ..coloc.records import result_record
    from ..coloc.timelapse import frame_signals, time_summary
    from ..coloc.verdict import judge_pair, prepare_image, warn_about_matrix
    from ..io.atomic import write_text_atomic
    from ..matrix import load_matrix

    matrix = load_matrix(args.matrix)
    pairs, thresholds = _check_options(args, matrix)
    inputs = list(args.inputs) + [p for p in (args.matrix, args.mask, args.objects, args.unmixed, args.flat) if p
                                  and p != "estimate"]
    outputs = {}
    for option, value in (("--json", args.json), ("--csv", args.csv)):
        if value:
            outputs[option] = check_output(value, inputs, option)
    if args.histograms and Path(args.histograms).exists() and not Path(args.histograms).is_dir():
        raise InputError(f"--histograms {args.histograms}: is a file; give a folder for the figures")
    warn_about_matrix(matrix)
    from ..io.acquisition import check_settings

    check_settings(matrix.provenance.get("acquisition"), args.inputs, strict=args.strict_settings,
                   reference_name=args.matrix, channels=matrix.channels, channel_names=name_list(args.channel_names))
    flats = _flats(files, args, matrix, args.inputs)
    registration = registration_from(args)
    series_list = [_Series(files, path, args, list(matrix.channels)) for path in args.inputs]
    if registration is not None:
        for series in series_list:
            registration.check(matrix.channels, series.data.shape, series.path)
    _name_figures(series_list)
    jobs = []  # (series, t, pair, object id, region)
    regions_of = {}
    for series in series_list:
        if series.data.shape[2] > 1 and len(series.planes) == 1 and args.plane is None:
            warnings.warn(f"{series.path}: one plane selected of a stack: measured as a 2-D plane", InputWarning)
        if series.data.shape[2] == 1 and "Z" in series.image.axes:
            warnings.warn(f"{series.path}: a stack with one plane: measured as a 2-D plane", InputWarning)
        if len(series.planes) > 1 and not series.z_spacing:
            warnings.warn(f"{series.path}: no voxel size in its metadata: depths are given in planes, not "
                          "micrometres", InputWarning)
        mask = _region_image(args.mask, "--mask", series, integer=False).astype(bool) if args.mask else None
        if mask is not None and not mask.any():
            raise InputError(f"--mask {args.mask}: selects no pixel; give a mask with pixels set")
        regions = [(None, mask)]
        if args.objects:
            regions = _object_regions(_region_image(args.objects, "--objects", series, integer=True), mask,
                                      args.objects)
        regions_of[series.path] = regions
        for t in series.frames:
            for pair in pairs:
                for object_id, region in regions:
                    jobs.append((series, t, pair, object_id, region))

    progress = _progress(len(jobs), args.quiet)
    results, summaries = [], []
    sources = {}
    for series, t, pair, object_id, region in jobs:
        key = (series.path, t)
        if key not in sources:
            sources.clear()  # one time point in memory at a time
            unmixed = None
            if args.unmixed:
                unmixed = _Series(files, args.unmixed, args, list(matrix.labels), "unmixed image").frame(t)
            sources[key] = prepare_image(series.frame(t), matrix, flat=flats, unmixed=unmixed, seed=args.seed,
                                         registration=registration)
        source = sources[key]
        min_shift = _psf_pixels(args, series) if args.psf else None
        measured = source
        if isinstance(region, _ObjectRegion):
            box, region = region(source.shape)
            measured = source.window(*box)
        result = judge_pair(measured, pair, mask=region, rounds=args.rounds, seed=args.seed, alpha=args.alpha,
                            min_r=args.min_r, thresholds=thresholds, threshold_method=args.threshold_method,
                            min_shift=min_shift, z_spacing=series.z_spacing)
        histogram = _histogram(args, measured, series, t, pair, object_id, region, result)
        results.append((series, t, object_id, result, histogram))
        progress.update(1)
    progress.close()

    for series in series_list:
        if not series.has_time or len(series.frames) < 2:
            continue
        signals = {}
        for t in series.frames:
            source = prepare_image(series.frame(t), matrix, flat=flats, seed=args.seed, registration=registration)
            for object_id, region in regions_of[series.path]:
                measured = source
                if isinstance(region, _ObjectRegion):
                    box, region = region(source.shape)
                    measured = source.window(*box)
                signals[(t, object_id)] = frame_signals(measured, region)
        for pair in pairs:
            for object_id, _ in regions_of[series.path]:
                chosen = [r for s, t, o, r, _ in results if s is series and o == object_id and r.pair == pair]
                summary = time_summary(pair, list(series.frames), [signals[(t, object_id)] for t in series.frames],
                                       chosen, args.bleach_limit)
                summaries.append({**summary, "image": str(series.path), "object": object_id})

    records = []
    for series, t, object_id, result, histogram in results:
        record = result_record(result, image=series.path, matrix_sha256=matrix.sha256(), object_id=object_id,
                               frame=t if series.has_time else None,
                               planes=None if series.data.shape[2] == 1 else (series.planes.start,
                                                                              series.planes.stop - 1))
        if histogram is not None:
            record["histogram"] = str(histogram)
        records.append(record)
    if "--json" in outputs:
        single = len(records) == 1 and records[0]["object"] is None and not summaries
        document = records[0] if single else {"results": records, **({"time_summaries": summaries} if summaries
                                                                     else {})}
        write_text_atomic(outputs["--json"], json.dumps(document, indent=2, allow_nan=False) + "\n")
    if "--csv" in outputs:
        write_text_atomic(outputs["--csv"], _csv(records))
    if not args.quiet:
        _print_summary(records, summaries)
    return 0


def _progress(total: int, quiet: bool):
    """A progress bar on a terminal (nothing in pipes or with --quiet)."""
    import sys

    from tqdm import tqdm

    return tqdm(total=total, desc="coloc", unit="measurement", disable=quiet or not sys.stderr.isatty() or total < 2,
                leave=False)


def _name_figures(series_list) -> None:
    """A figure name per input, unique: the file name without its image suffix, with a short checksum
    of the full path when two inputs would share it (same names in other folders, or names that differ
    only after a dot)."""
    import hashlib

    from ..io.images import output_stem

    stems = [output_stem(Path(series.path)) for series in series_list]
    for series, stem in zip(series_list, stems):
        if stems.count(stem) > 1:
            digest = hashlib.sha256(str(Path(series.path).resolve()).encode()).hexdigest()[:8]
            stem = f"{stem}_{digest}"
        series.stem = stem


def _histogram(args, source, series, t, pair, object_id, region, result):
    if not args.histograms:
        return None
    from ..coloc.verdict import pair_pixels
    from ..io.atomic import safe_file_name
    from ..report.plots import coloc_histograms, save_png

    folder = Path(args.histograms)
    folder.mkdir(parents=True, exist_ok=True)
    before_a, before_b, after_a, after_b = pair_pixels(source, pair, region)
    stem = safe_file_name(series.stem + f"_{pair[0]}-{pair[1]}"
                          + (f"_t{t}" if series.has_time else "")
                          + (f"_object{object_id}" if object_id is not None else ""))
    return save_png(coloc_histograms((before_a, before_b), (after_a, after_b), result),
                    folder / f"{stem}.png").resolve()


def _csv(records) -> str:
    import csv
    import io

    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    keys = ("pearson", "p_value", "spearman", "manders_m1", "manders_m2", "icq", "overlap", "n_pixels")
    writer.writerow(["image", "label_a", "label_b", "object", "frame", "planes", "verdict"]
                    + [f"before_{k}" for k in keys] + [f"after_{k}" for k in keys]
                    + ["after_pearson_noise_corrected", "after_corrected_low", "after_corrected_high", "inflation",
                       "depth_trend_per_plane", "saturated_pixels", "flat_field", "noise_model", "note"])

    def blank(value):
        return "" if value is None else value

    for record in records:
        interval = record["after"]["pearson_noise_corrected_interval"] or ["", ""]
        trend = (record.get("depth_trend") or {}).get("slope_per_plane")
        planes = "" if record["planes"] is None else f"{record['planes'][0]}:{record['planes'][1]}"
        writer.writerow([record["image"], *record["pair"], blank(record["object"]), blank(record["frame"]), planes,
                         record["verdict"]] + [blank(record["before"][k]) for k in keys]
                        + [blank(record["after"][k]) for k in keys]
                        + [blank(record["after"]["pearson_noise_corrected"]), *interval, blank(record["inflation"]),
                           blank(trend), record["saturated_pixels"], record["flat_field"], record["noise_model"],
                           "; ".join(n for n in (record["before"]["note"], record["after"]["note"]) if n)])
    return out.getvalue()


def _print_summary(records, summaries) -> None:
    from ..coloc.verdict import VERDICTS
    from ..report.summary import table

    def cell(c):
        if c["pearson"] is None:
            return "undefined"
        return f"{c['pearson']:.3f} (p {c['p_value']:.3g})" if c["p_value"] is not None else f"{c['pearson']:.3f}"

    def corrected(c):
        if c["pearson_noise_corrected"] is None:
            return "undefined"
        interval = c["pearson_noise_corrected_interval"]
        return (f"{c['pearson_noise_corrected']:.3f}" + (f" [{interval[0]:.3f}, {interval[1]:.3f}]" if interval
                                                         else "") + f" (p {c['p_value']:.3g})")

    rows = [["image", "pair", "object", "time", "Pearson r before", "r after, noise-corrected [95 %]", "verdict"]]
    for record in records:
        rows.append([Path(record["image"]).name, "/".join(record["pair"]),
                     "-" if record["object"] is None else str(record["object"]),
                     "-" if record["frame"] is None else str(record["frame"]), cell(record["before"]),
                     corrected(record["after"]), record["verdict"]])
    print(table(rows))
    print()
    for verdict in dict.fromkeys(r["verdict"] for r in records):
        print(f"{verdict}: {VERDICTS[verdict]}")
    notes = {n for r in records for n in (r["before"]["note"], r["after"]["note"]) if n}
    notes |= {(r.get("depth_trend") or {}).get("note") for r in records} - {None, ""}
    for summary in summaries:
        notes |= {f"{'/'.join(summary['pair'])}: {note}" for note in summary["notes"]}
    for note in sorted(notes):
        print(f"note: {note}")
