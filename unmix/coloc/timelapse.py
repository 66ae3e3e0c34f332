"""What happens to a pair over time: bleaching or drift, and an unmixing that stops fitting.

Each time point gets its own before/after verdict (:mod:`unmix.coloc.verdict`);
this module adds what only a series shows:

- bleaching or drift: each label's mean signal in its primary channel over
  the region, per time point; flagged when the last time point has lost more
  than a chosen fraction of the first's (photobleaching lowers the signal and
  the signal-to-noise ratio, and with it what the corrected r can resolve);
- the fit of the matrix: the mean squared residual of least-squares unmixing
  relative to what detector noise alone leaves (the trace of (I - H) Sigma
  for the hat matrix H = M P), per time point. A ratio that grows over time
  says the matrix no longer describes the labels (photoconversion, a label
  changing its spectrum, an unmodelled new signal). With as many channels as
  labels every image fits exactly and the check cannot be made.
"""

from __future__ import annotations

import numpy as np

BLEACH_LIMIT = 0.2
# A residual ratio this many times the first time point's, and above 1.2 itself, is flagged (a rule
# of this tool).
RESIDUAL_GROWTH = 1.5


def frame_signals(source, mask=None) -> dict:
    """Per label, the mean background-subtracted signal in its primary channel over the region, and
    the residual ratio of least-squares unmixing (None when channels = labels)."""
    from .verdict import region_planes

    matrix = source.matrix
    regions = region_planes(source, mask)
    primaries = [matrix.channels.index(matrix.primary[label]) for label in matrix.labels]
    hat = np.asarray(matrix.matrix) @ source.rows
    leftover = np.eye(hat.shape[0]) - hat
    fits = hat.shape[0] > source.rows.shape[0]
    sums, count, residual, expected = np.zeros(len(primaries)), 0, 0.0, 0.0
    for z in range(source.shape[0]):
        plane = source.plane(z)
        keep = plane.valid if regions is None else plane.valid & regions[z]
        signal = plane.signal[:, keep]
        count += signal.shape[1]
        sums += signal[primaries].sum(axis=1)
        if fits:
            misfit = leftover @ signal
            residual += float(np.sum(misfit**2))
            expected += float(np.diag(leftover) @ plane.variance[:, keep].sum(axis=1))
    return {"primary_mean": {label: float(sums[k] / count) if count else None for k, label in enumerate(matrix.labels)},
            "residual_ratio": residual / expected if fits and expected > 0 else None, "voxels": count}


def time_summary(pair, frames: list[int], signals: list[dict], results: list, bleach_limit: float = BLEACH_LIMIT
                 ) -> dict:
    """The pair's verdicts and corrected r over time, with the bleaching and fit checks."""
    verdicts: dict = {}
    for result in results:
        verdicts[result.verdict] = verdicts.get(result.verdict, 0) + 1
    bleaching = {}
    for label in pair:
        series = [s["primary_mean"][label] for s in signals]
        first, last = series[0], series[-1]
        fall = None if not first or first <= 0 or last is None else 1 - last / first
        bleaching[label] = {"mean_signal": series, "fall": fall,
                            "flagged": bool(fall is not None and fall > bleach_limit)}
    ratios = [s["residual_ratio"] for s in signals]
    residual = {"ratio": ratios, "flagged": False,
                "note": "as many channels as labels: the fit of the matrix cannot be checked" if ratios[0] is None
                else ""}
    if ratios[0] is not None and len(ratios) > 1:
        grows = [r for r in ratios[1:] if r > RESIDUAL_GROWTH * ratios[0] and r > 1.2]
        if grows:
            residual["flagged"] = True
            residual["note"] = (f"the unmixing residual grows from {ratios[0]:.2f} to {max(grows):.2f} times what "
                                "noise leaves: the matrix no longer fits (photoconversion, a changed spectrum, or "
                                "a new signal)")
    notes = [f"{label} loses {100 * b['fall']:.0f} % of its signal over the series (bleaching or drift)"
             for label, b in bleaching.items() if b["flagged"]]
    if residual["flagged"]:
        notes.append(residual["note"])
    return {"pair": list(pair), "frames": list(frames), "verdicts": verdicts,
            "pearson_noise_corrected": [r.after_corrected.r for r in results],
            "intervals": [None if r.after_corrected.interval is None else list(r.after_corrected.interval)
                          for r in results],
            "bleaching": bleaching, "residual": residual, "bleach_limit": bleach_limit, "notes": notes}
