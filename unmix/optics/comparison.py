"""Measured versus predicted bleed-through: a verdict per coefficient and the likely cause.

The prediction is first renormalised to the measured file's primary channels
(``P'[c,k] = P[c,k] / P[primary_measured(k), k]``), so both matrices answer
the same question. A measured primary where the prediction gives the label
less than ``PRIMARY_SHARE`` of its peak is refused rather than divided by
(swapped controls give exactly that). Then, for every off-primary coefficient:

- ``below-detection``: the measured value and the prediction are both below
  what the controls can resolve (the measured interval's width, and never
  below ``DETECTION_FLOOR``), so nothing is divided by a tiny prediction;
- ``agrees``: the prediction lies inside the measured 95 % interval widened
  by the model tolerance: multiplicatively by ``(1 + tolerance)`` (a
  tolerance on the log ratio, which matters for large coefficients) and
  additively by ``DETECTION_FLOOR`` (which matters for small ones);
- ``higher`` / ``lower``: the measured value is above / below that range.

A channel whose real optics differ from its description shows up twice: in
its own row (what leaks into it) and, through the renormalisation, in the
column of the label whose primary it is. :func:`likely_channel` scores each
channel by the disagreements it takes part in and names the one that
explains most of them.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..matrix import BleedThroughMatrix

# Model tolerance: the spectral model's coefficients are trusted to within
# 25 % (catalogue spectra, nominal filter curves, normal incidence; common practice).
MODEL_TOLERANCE = 0.25
# Smallest coefficient that single-label controls resolve in practice (common practice).
DETECTION_FLOOR = 0.002
# A label's measured primary channel must get at least this share of the label's predicted peak
# signal, else the two matrices do not describe the same label (a rule of this tool).
PRIMARY_SHARE = 0.1

CAUSES = {
    "higher": "more leakage than the optics predict: an emission filter wider, shifted or aged beyond its "
              "nominal curve, another filter in the cube, autofluorescence or a second label in the control, "
              "a mislabelled control, or detector settings that differ between channels",
    "lower": "less leakage than the optics predict: a filter narrower or better blocking than described, a "
             "label spectrum shifted by its environment, a detector gain or exposure that differs from the "
             "description, or a saturated primary channel in the control",
    "agrees": "the measured coefficient is what the optics predict",
    "below-detection": "both are below what the controls can resolve",
}


@dataclass(frozen=True)
class Comparison:
    coefficients: list  # one dict per off-primary coefficient
    likely_channel: str | None
    summary: str
    tolerance: float
    detection_floor: float

    def to_dict(self) -> dict:
        return {"coefficients": self.coefficients, "likely_channel": self.likely_channel, "summary": self.summary,
                "model_tolerance": self.tolerance, "detection_floor": self.detection_floor,
                "causes": CAUSES}

    def to_csv(self) -> str:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(["channel", "label", "measured", "ci95_low", "ci95_high", "predicted", "ratio", "verdict"])
        for row in self.coefficients:
            writer.writerow([row["channel"], row["label"], row["measured"], *row["ci95"], row["predicted"],
                             "" if row["ratio"] is None else row["ratio"], row["verdict"]])
        return out.getvalue()


def aligned_prediction(measured: BleedThroughMatrix, predicted: BleedThroughMatrix, where: str) -> np.ndarray:
    """The predicted matrix in the measured file's channel and label order, renormalised to its primaries."""
    if set(measured.channels) != set(predicted.channels):
        raise InputError(f"{where}: channels differ: measured {list(measured.channels)}, predicted "
                         f"{list(predicted.channels)}; describe the same channels")
    if set(measured.labels) != set(predicted.labels):
        raise InputError(f"{where}: labels differ: measured {list(measured.labels)}, predicted "
                         f"{list(predicted.labels)}; describe the same labels")
    rows = [predicted.channels.index(c) for c in measured.channels]
    columns = [predicted.labels.index(label) for label in measured.labels]
    values = predicted.matrix[np.ix_(rows, columns)]
    for k, label in enumerate(measured.labels):
        primary = measured.primary[label]
        reference, peak = values[measured.channels.index(primary), k], values[:, k].max()
        # Dividing by a near-zero prediction would turn every coefficient of the column into noise
        # times a huge factor: refuse, and say what usually causes it.
        if not reference > PRIMARY_SHARE * peak:
            brightest = measured.channels[int(np.argmax(values[:, k]))]
            share = f"{100 * max(reference, 0.0) / peak:.2g} %" if peak > 0 else "none"
            raise InputError(f"{where}: label {label!r} was measured brightest in {primary!r}, but the prediction "
                             f"gives it {share} of its peak signal there (it predicts {brightest!r}); the control "
                             f"given for {label!r} may be another label's (swapped controls?), or the description's "
                             "spectra are wrong: check the control's label, then the description")
        values[:, k] = values[:, k] / reference
    return values


def compare(measured: BleedThroughMatrix, predicted: BleedThroughMatrix, *, tolerance: float = MODEL_TOLERANCE,
            where: str = "compare") -> Comparison:
    """Verdict per off-primary coefficient of `measured` against `predicted`."""
    if measured.kind != "measured" or measured.ci95_low is None:
        raise InputError(f"{where}: the first file must be a measured matrix with confidence intervals")
    if predicted.kind != "predicted":
        raise InputError(f"{where}: the second file must be a predicted matrix (unmix predict)")
    prediction = aligned_prediction(measured, predicted, where)
    rows = []
    for k, label in enumerate(measured.labels):
        primary = measured.channels.index(measured.primary[label])
        for c, channel in enumerate(measured.channels):
            if c == primary:
                continue
            m, lo, hi, p = (float(measured.matrix[c, k]), float(measured.ci95_low[c, k]),
                            float(measured.ci95_high[c, k]), float(prediction[c, k]))
            limit = max(hi - lo, DETECTION_FLOOR)
            if m <= limit and p <= limit:
                verdict = "below-detection"
            elif p < lo / (1 + tolerance) - DETECTION_FLOOR:
                verdict = "higher"
            elif p > hi * (1 + tolerance) + DETECTION_FLOOR:
                verdict = "lower"
            else:
                verdict = "agrees"
            ratio = m / p if verdict != "below-detection" and p > DETECTION_FLOOR / 10 else None
            rows.append({"channel": channel, "label": label, "measured": m, "ci95": [lo, hi], "predicted": p,
                         "ratio": ratio, "verdict": verdict, "cause": CAUSES[verdict]})
    channel = likely_channel(rows, measured)
    return Comparison(rows, channel, _summary(rows, channel), tolerance, DETECTION_FLOOR)


def likely_channel(rows: list, measured: BleedThroughMatrix) -> str | None:
    """The channel that explains most disagreements (its row, and the columns of labels it is
    primary for), when it explains at least two and clearly more than any other; else None."""
    disagreements = [(r["channel"], r["label"]) for r in rows if r["verdict"] in ("higher", "lower")]
    if not disagreements:
        return None
    scores = {}
    for channel in measured.channels:
        own_labels = {label for label, primary in measured.primary.items() if primary == channel}
        scores[channel] = sum(1 for c, label in disagreements if c == channel or label in own_labels)
    ranked = sorted(scores.items(), key=lambda item: -item[1])
    best, score = ranked[0]
    runner_up = ranked[1][1] if len(ranked) > 1 else 0
    return best if score >= 2 and score > runner_up else None


def _summary(rows: list, channel: str | None) -> str:
    counts = {v: sum(1 for r in rows if r["verdict"] == v) for v in CAUSES}
    text = (f"{counts['agrees']} agree, {counts['higher']} measured higher, {counts['lower']} measured lower, "
            f"{counts['below-detection']} below detection, of {len(rows)} off-primary coefficients.")
    if channel:
        text += (f" The disagreements point at channel {channel!r}: check its emission filter, dichroic and "
                 "detector against the description.")
    elif counts["higher"] + counts["lower"]:
        text += " No single channel explains the disagreements; check the controls and the label spectra."
    return text


def comparison_texts(comparison: Comparison) -> dict:
    """The table as files: ``{"compare.json": text, "compare.csv": text}``."""
    return {"compare.json": json.dumps(comparison.to_dict(), indent=2, allow_nan=False) + "\n",
            "compare.csv": comparison.to_csv()}


def write_comparison(comparison: Comparison, outdir, extra: dict | None = None) -> dict:
    """Write compare.json, compare.csv and the `extra` files (``{name: bytes or text}``, e.g. plots)
    into `outdir`, all or none: each is complete before any is renamed into place. Returns the
    table's paths by kind."""
    from ..io.atomic import write_files_atomic

    outdir = Path(outdir)
    files = {**comparison_texts(comparison), **(extra or {})}
    outdir.mkdir(parents=True, exist_ok=True)
    write_files_atomic({outdir / name: data for name, data in files.items()})
    return {"json": outdir / "compare.json", "csv": outdir / "compare.csv"}
