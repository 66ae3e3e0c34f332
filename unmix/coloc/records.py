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


def check_record(record, where: str) -> dict:
    """Check one result object as written by ``unmix coloc``; return it."""
    if not isinstance(record, dict):
        raise InputError(f"{where}: a result must be an object; give the file written by unmix coloc --json")
    pair = record.get("pair")
    if not (isinstance(pair, list) and len(pair) == 2 and all(isinstance(p, str) and p for p in pair)):
        raise InputError(f"{where}: 'pair' must name two labels; give the file written by unmix coloc --json")
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
    profile = record.get("plane_profile")
    if profile is not None:
        if not isinstance(profile, list) or not all(
                isinstance(p, dict) and isinstance(p.get("plane"), int) and _number_or_null(p.get("pearson_before"))
                and _number_or_null(p.get("pearson_noise_corrected")) and _pair_of_numbers(p.get("interval"))
                for p in profile):
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
    if not (_number_or_null(trend.get("slope_per_plane")) and _pair_of_numbers(trend.get("interval"))):
        raise InputError(f"{where}: 'depth_trend' holds values of the wrong type; give the file written by unmix "
                         "coloc --json")
    return record


def load_records(path) -> list[dict]:
    """The checked result objects of a coloc JSON file, each with its `source` file."""
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
    return checked


def _reject_constant(name):
    raise ValueError(f"non-standard JSON number {name}")
