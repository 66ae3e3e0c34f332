"""The colocalization results file (``unmix coloc --json``): its result objects, and the file read
back and checked.

A file holds one result object, or ``{"results": [...], "time_summaries": [...]}``.
Every value a later step reads is checked for its type before use, so that a
damaged or hand-edited file gives one line naming the file and the key, never
a crash.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import NamedTuple

from ..errors import InputError, read_user_text
from .verdict import VERDICTS

_NUMBERS = ("pearson", "spearman", "manders_m1", "manders_m2", "m1_above_own_threshold", "m2_above_own_threshold",
            "overlap", "icq", "p_value", "pearson_noise_corrected", "n_pixels")


def result_record(result, *, image, matrix_sha256: str, object_id: int | None = None, frame: int | None = None,
                  planes: tuple[int, int] | None = None) -> dict:
    """One result object of the file: a :class:`~unmix.coloc.verdict.PairResult` with where it was measured.

    `planes` (first, last) are the planes of a stack that were measured (None for a plane);
    `frame` the time point of a series (None otherwise). A stack's per-plane r's go under
    ``plane_profile``.
    """
    record = result.to_dict()
    record.update({"image": str(image), "object": object_id, "matrix_sha256": matrix_sha256, "frame": frame,
                   "planes": None if planes is None else [int(planes[0]), int(planes[1])],
                   "plane_profile": record.pop("planes")})
    return record


def _is_number(value) -> bool:
    if not isinstance(value, (int, float)) or isinstance(value, bool):
        return False
    try:
        return math.isfinite(value)
    except OverflowError:  # an integer too large for a float
        return False


def _number_or_null(value) -> bool:
    return value is None or _is_number(value)


def _pair_of_numbers(value) -> bool:
    return value is None or (isinstance(value, list) and len(value) == 2 and all(_is_number(v) for v in value))


# Plane and time-point indices are drawn on figure axes: bounded, so that a hand-edited file cannot
# ask for an axis beyond what floats hold.
_LARGEST_INDEX = 10**9


def _index(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and 0 <= value <= _LARGEST_INDEX


def _series_of(value, length: int, check) -> bool:
    return isinstance(value, list) and len(value) == length and all(check(v) for v in value)


_PLANE_KEYS = ("plane", "pearson_before", "pearson_noise_corrected", "interval")  # of each plane_profile entry


def _check_side(side, name: str, where: str) -> None:
    if not isinstance(side, dict) or not side:
        raise InputError(f"{where}: '{name}' must be an object of coefficients; give the file written by unmix coloc")
    for key in _NUMBERS:
        if key in side and not _number_or_null(side[key]):
            raise InputError(f"{where}: '{name}.{key}' must be a number or null; give the file written by unmix "
                             "coloc")
    for key in ("thresholds", "pearson_noise_corrected_interval"):
        if key in side and not _pair_of_numbers(side[key]):
            raise InputError(f"{where}: '{name}.{key}' must be two numbers or null; give the file written by "
                             "unmix coloc")
    for key in ("note", "threshold_method"):
        if key in side and not isinstance(side[key], str):
            raise InputError(f"{where}: '{name}.{key}' must be text; give the file written by unmix coloc")


def _check_pair_object(item, what: str, where: str) -> None:
    """`item` is an object naming a pair of labels."""
    if not isinstance(item, dict):
        raise InputError(f"{where}: a {what} must be an object; give the file written by unmix coloc --json")
    pair = item.get("pair")
    if not (isinstance(pair, list) and len(pair) == 2 and all(isinstance(p, str) and p for p in pair)):
        raise InputError(f"{where}: 'pair' must name two labels; give the file written by unmix coloc --json")


def check_record(record, where: str) -> dict:
    """Check one result object as written by ``unmix coloc``; return it."""
    _check_pair_object(record, "result", where)
    verdict = record.get("verdict")
    if not isinstance(verdict, str) or verdict not in VERDICTS:
        raise InputError(f"{where}: unknown verdict {verdict!r}; give the file written by unmix coloc --json")
    for name in ("before", "after"):
        _check_side(record.get(name), name, where)
    for key in ("inflation", "saturated_pixels", "pixels", "min_r", "alpha", "z_step_um"):
        if key in record and not _number_or_null(record[key]):
            raise InputError(f"{where}: '{key}' must be a number or null; give the file written by unmix coloc")
    for key in ("image", "histogram", "matrix_sha256", "reason", "flat_field", "noise_model", "matrix_uncertainty",
                "dimensions"):
        if key in record and record[key] is not None and not isinstance(record[key], str):
            raise InputError(f"{where}: '{key}' must be text; give the file written by unmix coloc --json")
    for key in ("object", "frame"):
        value = record.get(key)
        if value is not None and not (isinstance(value, int) and not isinstance(value, bool)):
            raise InputError(f"{where}: '{key}' must be a whole number or null; give the file written by unmix coloc")
    planes = record.get("planes")
    if planes is not None and not (isinstance(planes, list) and len(planes) == 2 and all(map(_index, planes))
                                   and planes[0] <= planes[1]):
        raise InputError(f"{where}: 'planes' must be the first and last plane measured; give the file written by "
                         "unmix coloc --json")
    profile = record.get("plane_profile")
    if profile is not None:
        if not isinstance(profile, list) or not all(
                isinstance(p, dict) and all(key in p for key in _PLANE_KEYS) and _index(p["plane"])
                and _number_or_null(p["pearson_before"]) and _number_or_null(p["pearson_noise_corrected"])
                and _pair_of_numbers(p["interval"]) for p in profile):
            raise InputError(f"{where}: 'plane_profile' must be a list of planes with their r's; give the file "
                             "written by unmix coloc --json")
    for key in ("depth_trend", "after_nonnegative"):
        if record.get(key) is not None and not isinstance(record[key], dict):
            raise InputError(f"{where}: '{key}' must be an object; give the file written by unmix coloc --json")
    nonnegative = record.get("after_nonnegative") or {}
    if not all(_number_or_null(nonnegative.get(key)) for key in ("pearson", "manders_m1", "manders_m2")):
        raise InputError(f"{where}: 'after_nonnegative' holds values of the wrong type; give the file written by "
                         "unmix coloc --json")
    trend = record.get("depth_trend") or {}
    if not (_number_or_null(trend.get("slope_per_plane")) and _pair_of_numbers(trend.get("interval"))
            and _number_or_null(trend.get("slope_per_um")) and isinstance(trend.get("flagged", False), bool)
            and isinstance(trend.get("note", ""), str)):
        raise InputError(f"{where}: 'depth_trend' holds values of the wrong type; give the file written by unmix "
                         "coloc --json")
    return record


def check_time_summary(summary, where: str) -> dict:
    """Check one summary over time (``time_summaries`` of the file) as written by ``unmix coloc``; return it."""
    fix = "give the file written by unmix coloc --json"
    _check_pair_object(summary, "time summary", where)
    frames = summary.get("frames")
    if not (isinstance(frames, list) and frames and all(map(_index, frames))):
        raise InputError(f"{where}: 'frames' must list the time points measured; {fix}")
    n = len(frames)
    verdicts = summary.get("verdicts")
    if not (isinstance(verdicts, dict) and all(v in VERDICTS and _index(count) for v, count in verdicts.items())):
        raise InputError(f"{where}: 'verdicts' must count known verdicts; {fix}")
    if not _series_of(summary.get("pearson_noise_corrected"), n, _number_or_null):
        raise InputError(f"{where}: 'pearson_noise_corrected' must hold one r (or null) per time point; {fix}")
    if not _series_of(summary.get("intervals"), n, _pair_of_numbers):
        raise InputError(f"{where}: 'intervals' must hold one interval (or null) per time point; {fix}")
    bleaching = summary.get("bleaching")
    if not (isinstance(bleaching, dict) and all(
            isinstance(b, dict) and _series_of(b.get("mean_signal"), n, _number_or_null)
            and _number_or_null(b.get("fall")) and isinstance(b.get("flagged"), bool) for b in bleaching.values())):
        raise InputError(f"{where}: 'bleaching' must hold each label's mean signal per time point, its fall and "
                         f"whether it is flagged; {fix}")
    residual = summary.get("residual")
    if not (isinstance(residual, dict) and _series_of(residual.get("ratio"), n, _number_or_null)
            and isinstance(residual.get("flagged"), bool) and isinstance(residual.get("note"), str)):
        raise InputError(f"{where}: 'residual' must hold a ratio (or null) per time point, whether it is flagged "
                         f"and a note; {fix}")
    if not (_is_number(summary.get("bleach_limit")) and 0 < summary["bleach_limit"] < 1):
        raise InputError(f"{where}: 'bleach_limit' must be a fraction between 0 and 1; {fix}")
    notes = summary.get("notes", [])
    if not (isinstance(notes, list) and all(isinstance(note, str) for note in notes)):
        raise InputError(f"{where}: 'notes' must be a list of text; {fix}")
    if summary.get("image") is not None and not isinstance(summary["image"], str):
        raise InputError(f"{where}: 'image' must be text; {fix}")
    value = summary.get("object")
    if value is not None and not (isinstance(value, int) and not isinstance(value, bool)):
        raise InputError(f"{where}: 'object' must be a whole number or null; {fix}")
    return summary


class ColocFile(NamedTuple):
    """The checked contents of a coloc JSON file, each object with its `source` file."""

    records: list[dict]
    time_summaries: list[dict]


def load_records(path) -> ColocFile:
    """The checked result objects and summaries over time of a coloc JSON file (either shape), each
    with its `source` file."""
    path = Path(path)
    text = read_user_text(path, "coloc file", "give the JSON written by unmix coloc --json")
    try:
        data = json.loads(text, parse_constant=_reject_constant)
    except (json.JSONDecodeError, ValueError, RecursionError) as exc:
        detail = f"line {exc.lineno}" if isinstance(exc, json.JSONDecodeError) else "nested too deeply or not JSON"
        raise InputError(f"{path}: not valid JSON ({detail}); give the file written by unmix coloc --json") from None
    records = data.get("results") if isinstance(data, dict) and "results" in data else [data]
    if not isinstance(records, list) or not records:
        raise InputError(f"{path}: 'results' must be a non-empty list; give the file written by unmix coloc --json")
    checked = []
    for index, record in enumerate(records):
        where = str(path) if len(records) == 1 else f"{path}: result {index + 1}"
        checked.append({**check_record(record, where), "source": str(path)})
    summaries = data.get("time_summaries", []) if isinstance(data, dict) and "results" in data else []
    if not isinstance(summaries, list):
        raise InputError(f"{path}: 'time_summaries' must be a list; give the file written by unmix coloc --json")
    summaries = [{**check_time_summary(summary, f"{path}: time summary {index + 1}"), "source": str(path)}
                 for index, summary in enumerate(summaries)]
    return ColocFile(checked, summaries)


def _reject_constant(name):
    raise ValueError(f"non-standard JSON number {name}")
