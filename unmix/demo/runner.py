"""The whole job run on the shipped demo scenario: measure, unmix, predict and compare, coloc, report.

Usage::

    unmix demo -o OUTDIR
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

from .scenario import demo_inputs, load_scenario


def run_demo(outdir, out=None) -> dict:
    """Run the tool on the shipped demo scenario, writing results to `outdir`.

    Idempotent: run again into the same folder, it replaces its own earlier results (each file
    written atomically) and leaves any other file there alone.
    """
    out = out or sys.stdout
    from ..matrix import load_matrix
    from ..measure.controls import measure_files
    from ..report.summary import matrix_summary

    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    inputs = demo_inputs()
    truth = json.loads(inputs["truth"].read_text(encoding="utf-8"))
    matrix = measure_files(inputs["controls"], unstained=inputs["unstained"])
    matrix_path = matrix.save(outdir / "demo_matrix.json")
    csv_path = matrix.save_csv(outdir / "demo_matrix.csv")
    print(f"Demo: {truth['scenario']['lab']}, {truth['scenario']['instrument']} (invented scenario)", file=out)
    print(matrix_summary(matrix, flags=False), file=out)
    true = np.asarray(truth["matrix"])
    inside = (matrix.ci95_low <= true + 1e-12) & (true - 1e-12 <= matrix.ci95_high)
    print(f"\nTrue coefficients inside the measured 95 % interval: {int(inside.sum())} of {inside.size}",
          file=out)

    from ..engine.batch import ApplySettings, apply_matrix
    from ..io.images import read_image

    # The folder is the demo's own: a rerun replaces its earlier results (each file atomically).
    result, stack_result = apply_matrix(matrix, [inputs["sample"], inputs["sample_stack"]], outdir / "unmixed",
                                        settings=ApplySettings(overwrite=True))
    for done in (result, stack_result):
        if done.status == "failed":
            raise RuntimeError(f"demo stack {done.input} failed to unmix: {done.message}")
    unmixed = read_image(result.output).data
    true_abundances = read_image(inputs["sample"].with_name("sample_truth.ome.tif")).data
    print("\nUnmixed sample against the simulated truth (RMS error, ADU):", file=out)
    errors = {}
    for k, label in enumerate(matrix.labels):
        errors[label] = float(np.sqrt(np.mean((unmixed[k] - true_abundances[k]) ** 2)))
        print(f"  {label}: {errors[label]:.1f} (peak signal {true_abundances[k].max():.0f})", file=out)
    comparison, compare_dir, description = _measured_versus_predicted(matrix, outdir, out)
    print("\nColocalization before and after unmixing:", file=out)
    coloc_records = _colocalization(matrix, inputs["sample"], Path(result.output), truth["pairs"],
                                    outdir / "coloc.json", out)
    print("\nThe z-stack, in 3-D over its voxels (never a projection), against the simulated truth:", file=out)
    stack_records = _colocalization(matrix, inputs["sample_stack"], Path(stack_result.output), truth["pairs"],
                                    outdir / "coloc_stack.json", out, truth=_stack_truth(inputs, truth))

    from ..report.html import build_report, write_report

    predicted = load_matrix(outdir / "demo_predicted.json")
    report = write_report(outdir / "demo_report.html", build_report(
        matrix, matrix_path=matrix_path, predicted=predicted, predicted_path=outdir / "demo_predicted.json",
        coloc_records=coloc_records + stack_records, samples=[inputs["sample"]], description=description,
        description_path=description.path, title="Demo: bleed-through and colocalization report (invented scenario)"))
    print(f"\nMatrix:    {matrix_path}\nTable:     {csv_path}\nUnmixed:   {result.output}\n"
          f"Predicted: {outdir / 'demo_predicted.json'}\nCompared:  {compare_dir}\n"
          f"Coloc:     {outdir / 'coloc.json'}\nColoc 3-D: {outdir / 'coloc_stack.json'}\nReport:    {report}",
          file=out)
    return {"matrix": matrix_path, "csv": csv_path, "unmixed": Path(result.output),
            "truth_inside_ci": int(inside.sum()), "coefficients": int(inside.size), "rms_error": errors,
            "compare": compare_dir, "likely_channel": comparison.likely_channel,
            "verdicts": {(r["channel"], r["label"]): r["verdict"] for r in comparison.coefficients},
            "coloc": {tuple(r["pair"]): r["verdict"] for r in coloc_records},
            "coloc_stack": {tuple(r["pair"]): r["verdict"] for r in stack_records}, "report": report}


def _colocalization(matrix, image_path: Path, unmixed_path: Path, pairs: dict, json_path: Path, out,
                    truth: dict | None = None) -> list[dict]:
    """Before/after colocalization of the demo's two pairs in one image (a plane, or a z-stack measured in
    3-D), with histograms of a plane; the records written to `json_path` as coloc writes them, and returned.

    `truth`, per pair, the Pearson r of the simulated abundances and of their noise-free primary
    channels, printed beside each verdict.
    """
    from ..coloc.records import result_record
    from ..coloc.verdict import judge_pair, pair_pixels, prepare_image
    from ..io.atomic import safe_file_name, write_text_atomic
    from ..io.images import read_image
    from ..report.plots import coloc_histograms, save_png

    image = read_image(image_path)
    raw = np.asarray(image.select_channels(matrix.channels).data)
    unmixed = np.asarray(read_image(unmixed_path).select_channels(matrix.labels).data)
    source = prepare_image(raw, matrix, unmixed=unmixed)
    n_planes = source.shape[0]
    z_step = image.pixel_size.get("Z") if n_planes > 1 else None
    records = []
    for role in ("independent_but_bleeding", "truly_overlapping"):
        pair = tuple(pairs[role])
        result = judge_pair(source, pair, z_spacing=z_step)
        record = result_record(result, image=image_path, matrix_sha256=matrix.sha256(),
                               planes=None if n_planes == 1 else (0, n_planes - 1))
        # A stack's figure is its depth profile, drawn by the report: its histograms would double the
        # time the stack takes.
        if n_planes == 1:
            before_a, before_b, after_a, after_b = pair_pixels(source, pair)
            histogram = save_png(coloc_histograms((before_a, before_b), (after_a, after_b), result),
                                 json_path.parent / safe_file_name(f"coloc_{pair[0]}-{pair[1]}.png"))
            record["histogram"] = str(histogram.resolve())
        records.append(record)
        where = "" if n_planes == 1 else f", 3-D over {n_planes} planes{f' {z_step:g} µm apart' if z_step else ''}"
        corrected = result.after_corrected
        after = "undefined" if corrected.r is None else f"{corrected.r:.3f}" + (
            "" if corrected.interval is None else f" [{corrected.interval[0]:.3f}, {corrected.interval[1]:.3f}]")
        line = (f"  {pair[0]} / {pair[1]} ({role.replace('_', ' ')}{where}): Pearson r {result.before.pearson:.3f} "
                f"before, {after} after (noise-corrected): {result.verdict}")
        if truth is not None:
            line += (f"\n    simulated truth: r {truth[pair]['abundances']:.3f} between the labels, "
                     f"{truth[pair]['channels']:.3f} between their noise-free primary channels")
        print(line, file=out)
    write_text_atomic(json_path, json.dumps({"results": records}, indent=2, allow_nan=False) + "\n")
    return [{**record, "source": str(json_path)} for record in records]


def _stack_truth(inputs: dict, truth: dict) -> dict:
    """Per demo pair, the Pearson r over the z-stack's voxels of the simulated abundances, and of the
    noise-free primary channels that the true matrix makes of them (what bleed-through alone gives)."""
    from ..io.images import read_image

    labels, channels = truth["labels"], truth["channels"]
    abundances = np.asarray(read_image(inputs["sample_stack"].with_name("sample_stack_truth.ome.tif")).data,
                            dtype=np.float64).reshape(len(labels), -1)
    mixed = np.asarray(truth["matrix"]) @ abundances
    values = {}
    for pair in map(tuple, truth["pairs"].values()):
        ka, kb = (labels.index(label) for label in pair)
        ca, cb = (channels.index(truth["primary"][label]) for label in pair)
        values[pair] = {"abundances": float(np.corrcoef(abundances[ka], abundances[kb])[0, 1]),
                        "channels": float(np.corrcoef(mixed[ca], mixed[cb])[0, 1])}
    return values


def _measured_versus_predicted(matrix, outdir: Path, out):
    """Predict the matrix from the instrument's description and compare the measured one with it."""
    from ..optics.comparison import compare, write_comparison
    from ..optics.prediction import predict
    from ..report.plots import comparison_pngs
    from ..report.summary import comparison_rows, table

    scenario = load_scenario()
    description = scenario.described_optics()
    predicted = predict(description).matrix
    predicted.save(outdir / "demo_predicted.json")
    comparison = compare(matrix, predicted)
    compare_dir = outdir / "compare"
    write_comparison(comparison, compare_dir, extra=comparison_pngs(matrix, predicted, comparison, description))
    print("\nMeasured versus predicted from the instrument's description:", file=out)
    print(table(comparison_rows(comparison)), file=out)
    print(comparison.summary, file=out)
    return comparison, compare_dir, description
