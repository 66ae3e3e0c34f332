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
    (result,) = apply_matrix(matrix, [inputs["sample"]], outdir / "unmixed", settings=ApplySettings(overwrite=True))
    if result.status == "failed":
        raise RuntimeError(f"demo sample failed to unmix: {result.message}")
    unmixed = read_image(result.output).data
    true_abundances = read_image(inputs["sample"].with_name("sample_truth.ome.tif")).data
    print("\nUnmixed sample against the simulated truth (RMS error, ADU):", file=out)
    errors = {}
    for k, label in enumerate(matrix.labels):
        errors[label] = float(np.sqrt(np.mean((unmixed[k] - true_abundances[k]) ** 2)))
        print(f"  {label}: {errors[label]:.1f} (peak signal {true_abundances[k].max():.0f})", file=out)
    comparison, compare_dir, description = _measured_versus_predicted(matrix, outdir, out)
    coloc_records = _colocalization(matrix, inputs["sample"], Path(result.output), truth["pairs"], outdir, out)

    from ..report.html import build_report, write_report

    predicted = load_matrix(outdir / "demo_predicted.json")
    report = write_report(outdir / "demo_report.html", build_report(
        matrix, matrix_path=matrix_path, predicted=predicted, predicted_path=outdir / "demo_predicted.json",
        coloc_records=coloc_records, samples=[inputs["sample"]], description=description,
        description_path=description.path, title="Demo: bleed-through and colocalization report (invented scenario)"))
    print(f"\nMatrix:    {matrix_path}\nTable:     {csv_path}\nUnmixed:   {result.output}\n"
          f"Predicted: {outdir / 'demo_predicted.json'}\nCompared:  {compare_dir}\n"
          f"Coloc:     {outdir / 'coloc.json'}\nReport:    {report}", file=out)
    return {"matrix": matrix_path, "csv": csv_path, "unmixed": Path(result.output),
            "truth_inside_ci": int(inside.sum()), "coefficients": int(inside.size), "rms_error": errors,
            "compare": compare_dir, "likely_channel": comparison.likely_channel,
            "verdicts": {(r["channel"], r["label"]): r["verdict"] for r in comparison.coefficients},
            "coloc": {tuple(r["pair"]): r["verdict"] for r in coloc_records}, "report": report}


def _colocalization(matrix, sample: Path, unmixed_path: Path, pairs: dict, outdir: Path, out) -> list[dict]:
    """Before/after colocalization of the demo's two pairs, with histograms; records as coloc writes them."""
    from ..coloc.verdict import judge_pair, pair_pixels, prepare_image
    from ..io.atomic import safe_file_name, write_text_atomic
    from ..io.images import read_image
    from ..report.plots import coloc_histograms, save_png

    raw = np.asarray(read_image(sample).select_channels(matrix.channels).data)
    unmixed = np.asarray(read_image(unmixed_path).select_channels(matrix.labels).data)
    image = prepare_image(raw, matrix, unmixed=unmixed)
    records = []
    print("\nColocalization before and after unmixing:", file=out)
    for role in ("independent_but_bleeding", "truly_overlapping"):
        pair = tuple(pairs[role])
        result = judge_pair(image, pair)
        before_a, before_b, after_a, after_b = pair_pixels(image, pair)
        histogram = save_png(coloc_histograms((before_a, before_b), (after_a, after_b), result),
                             outdir / safe_file_name(f"coloc_{pair[0]}-{pair[1]}.png"))
        record = {**result.to_dict(), "image": str(sample), "object": None, "matrix_sha256": matrix.sha256(),
                  "histogram": str(histogram.resolve())}
        records.append(record)
        print(f"  {pair[0]} / {pair[1]} ({role.replace('_', ' ')}): Pearson r {result.before.pearson:.3f} before, "
              f"{result.after.pearson:.3f} after: {result.verdict}", file=out)
    write_text_atomic(outdir / "coloc.json", json.dumps({"results": records}, indent=2, allow_nan=False) + "\n")
    return [{**record, "source": str(outdir / "coloc.json")} for record in records]


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
