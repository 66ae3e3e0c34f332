"""The bleed-through matrix and its file.

``M[c, k]`` is the signal of label ``k`` in channel ``c`` divided by its
signal in its primary channel, so every column is 1 at its primary channel.
The file format (``"format": "unmix-matrix"``, version 2) is JSON; loading
validates every field and names the first one that is wrong. Version 1 files
(without ``noise_model`` and ``column_covariance``) still load.

Version 2 adds, for a measured matrix:

- ``noise_model``: the detector's photon-transfer line per channel, variance
  = ``read_variance`` + ``gain`` x (background-subtracted signal), in input
  units, and where it was measured (``source``);
- ``column_covariance``: for each label, the C x C covariance of its column
  of coefficients. Columns come from different controls and are independent
  of each other; within a column the coefficients share the control's noise
  and fields. Matrix draws for uncertainty propagation use it.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .io.atomic import write_text_atomic
from .errors import InputError, read_user_text

FORMAT = "unmix-matrix"
VERSION = 2
READABLE_VERSIONS = (1, 2)
NOISE_SOURCES = ("controls", "controls and dark frame", "image")
KINDS = ("measured", "predicted")
BACKGROUND_SOURCES = ("unstained", "dark", "estimated")
_PRIMARY_TOLERANCE = 1e-6
# Unmixing refuses a matrix whose labels are this nearly collinear (condition number of the
# column-scaled matrix) and warns above CONDITION_WARNING. At cond 1e6 a label's noise can be
# amplified up to a million-fold and float32 abundances keep only about one significant digit
# of the least-squares answer; from about 1e3 on the noise penalty already dominates a result.
# (common practice: the usual rule that log10(cond) digits of precision are lost)
CONDITION_LIMIT = 1e6
CONDITION_WARNING = 1e3


@dataclass(frozen=True)
class BleedThroughMatrix:
    """A measured or predicted bleed-through matrix with its metadata.

    Attributes
    ----------
    kind : {"measured", "predicted"}
    channels : tuple of str
        C channel names, in image channel order (the matrix rows).
    labels : tuple of str
        K label names (the matrix columns).
    primary : dict
        Label name -> its primary channel name.
    matrix : ndarray, shape (C, K)
    ci95_low, ci95_high : ndarray, shape (C, K), or None
        95 % interval per coefficient (measured only).
    background : ndarray, shape (C,), or None
        Level subtracted before unmixing, in input units (measured only).
    background_source : {"unstained", "dark", "estimated"} or None
    saturation : ndarray, shape (C,), or None
    noise_model : dict or None
        ``{"read_variance": (C,), "gain": (C,), "source": str}``: variance of a
        pixel = read_variance + gain x background-subtracted signal (input units).
    column_covariance : ndarray, shape (K, C, C), or None
        Covariance of each label's column of coefficients (measured only);
        rows and columns of the primary channel are 0.
    qc : dict
        Quality figures per coefficient and per label.
    provenance : dict
        Inputs, parameters, software version, time.
    """

    kind: str
    channels: tuple
    labels: tuple
    primary: dict
    matrix: np.ndarray
    ci95_low: np.ndarray | None = None
    ci95_high: np.ndarray | None = None
    background: np.ndarray | None = None
    background_source: str | None = None
    saturation: np.ndarray | None = None
    noise_model: dict | None = None
    column_covariance: np.ndarray | None = None
    qc: dict = field(default_factory=dict)
    provenance: dict = field(default_factory=dict)

    def __post_init__(self):
        validate_matrix_dict(self.to_dict(), "matrix")

    # --- numbers derived from M -------------------------------------------

    def noise_penalty(self) -> np.ndarray:
        """Noise amplification per label, ``[(M^T M)^-1]_kk``.

        With equal white noise in every channel and unconstrained least
        squares, the variance of label k's abundance is multiplied by this
        factor relative to an identity matrix (Lawson & Hanson 1974, ch. 7;
        values below 1 are possible when there are more channels than labels).

        References
        ----------
        C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*,
        Prentice-Hall, 1974.
        """
        gram = self.matrix.T @ self.matrix
        return np.diag(np.linalg.pinv(gram))

    def condition_number(self) -> float:
        """2-norm condition number of M (ratio of extreme singular values)."""
        return float(np.linalg.cond(self.matrix))

    def draws(self, n: int, rng) -> np.ndarray | None:
        """`n` draws (n, C, K) of the matrix from its measurement uncertainty, or None without one.

        Columns are drawn independently (each comes from its own control),
        within a column jointly from its covariance; without a covariance
        (version 1 files), each coefficient independently from a normal whose
        95 % interval is the stored one. Primary coefficients stay 1.
        """
        if self.column_covariance is not None:
            draws = np.repeat(self.matrix[None], n, axis=0)
            for k in range(len(self.labels)):
                values, vectors = np.linalg.eigh(self.column_covariance[k])
                root = vectors * np.sqrt(np.clip(values, 0, None))
                draws[:, :, k] += rng.standard_normal((n, len(self.channels))) @ root.T
        elif self.ci95_low is not None:
            sd = (self.ci95_high - self.ci95_low) / (2 * 1.959963984540054)
            draws = self.matrix[None] + sd[None] * rng.standard_normal((n,) + self.matrix.shape)
        else:
            return None
        for k, label in enumerate(self.labels):
            draws[:, self.channels.index(self.primary[label]), k] = 1.0
        return draws

    def check_unmixable(self, where: str = "matrix", warn: bool = True) -> float:
        """:func:`check_unmixable` with this matrix's label names."""
        return check_unmixable(self.matrix, self.labels, where, warn)

    def column(self, label: str) -> np.ndarray:
        return self.matrix[:, self.labels.index(label)]

    # --- serialisation -------------------------------------------------------

    def to_dict(self) -> dict:
        def listed(a):
            return None if a is None else np.asarray(a, dtype=float).tolist()

        return {
            "format": FORMAT,
            "version": VERSION,
            "kind": self.kind,
            "channels": list(self.channels),
            "labels": list(self.labels),
            "primary": dict(self.primary),
            "matrix": listed(self.matrix),
            "ci95_low": listed(self.ci95_low),
            "ci95_high": listed(self.ci95_high),
            "background": listed(self.background),
            "background_source": self.background_source,
            "saturation": listed(self.saturation),
            "noise_model": None if self.noise_model is None else {
                "read_variance": listed(self.noise_model["read_variance"]),
                "gain": listed(self.noise_model["gain"]), "source": self.noise_model["source"]},
            "column_covariance": listed(self.column_covariance),
            "qc": self.qc,
            "provenance": self.provenance,
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n"

    def sha256(self) -> str:
        """Checksum of the canonical JSON text, identifying this matrix."""
        return hashlib.sha256(self.to_json().encode("utf-8")).hexdigest()

    def save(self, path) -> Path:
        """Write the matrix file atomically."""
        write_text_atomic(path, self.to_json())
        return Path(path)

    def to_csv(self) -> str:
        """One row per coefficient: value, interval and the main QC figures."""
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        per_coefficient = [k for k, v in self.qc.items() if _is_grid(v, self.matrix.shape)]
        writer.writerow(["channel", "label", "primary", "coefficient", "ci95_low", "ci95_high",
                         *per_coefficient])
        for c, channel in enumerate(self.channels):
            for k, label in enumerate(self.labels):
                row = [channel, label, self.primary[label], self.matrix[c, k]]
                for bounds in (self.ci95_low, self.ci95_high):
                    row.append("" if bounds is None else bounds[c, k])
                row += [self.qc[name][c][k] for name in per_coefficient]
                writer.writerow(["" if v is None else v for v in row])
        return out.getvalue()

    def save_csv(self, path) -> Path:
        write_text_atomic(path, self.to_csv())
        return Path(path)

    @classmethod
    def from_dict(cls, data: dict, where: str = "matrix") -> "BleedThroughMatrix":
        validate_matrix_dict(data, where)

        def array(key):
            value = data.get(key)
            return None if value is None else np.asarray(value, dtype=float)

        return cls(
            kind=data["kind"], channels=tuple(data["channels"]), labels=tuple(data["labels"]),
            primary=dict(data["primary"]), matrix=array("matrix"), ci95_low=array("ci95_low"),
            ci95_high=array("ci95_high"), background=array("background"),
            background_source=data.get("background_source"), saturation=array("saturation"),
            noise_model=_noise_model(data.get("noise_model")), column_covariance=array("column_covariance"),
            qc=dict(data.get("qc") or {}), provenance=dict(data.get("provenance") or {}),
        )


def scaled_condition_number(matrix) -> float:
    """Condition number of M with every column scaled to unit length (inf when rank-deficient).

    A label's brightness scale does not make it harder to tell apart from the
    others; the scaled number measures only how nearly collinear the columns
    are, and is what the solver works with (:mod:`unmix.engine.solver`). For a
    bleed-through matrix (each column 1 at its primary channel) it is close to
    :meth:`BleedThroughMatrix.condition_number`.
    """
    m = np.asarray(matrix, dtype=float)
    norms = np.linalg.norm(m, axis=0)
    if m.shape[0] < m.shape[1] or not np.all(norms > 0):
        return float("inf")
    singular = np.linalg.svd(m / norms, compute_uv=False)
    return float(singular[0] / singular[-1]) if singular[-1] > 0 else float("inf")


def check_unmixable(matrix, labels=None, where: str = "matrix", warn: bool = True) -> float:
    """Refuse a matrix that per-pixel unmixing cannot use; return its scaled condition number.

    Raises InputError, naming the labels concerned, when there are more
    labels than channels, a label's column is zero, or the labels are so
    nearly collinear that the scaled condition number exceeds
    ``CONDITION_LIMIT`` (1e6); the nearly collinear labels are those with the
    largest weights in the right singular vector of the smallest singular
    value. Above ``CONDITION_WARNING`` (1e3) it warns (InputWarning) when
    `warn` is true.
    """
    import warnings

    from .errors import InputWarning

    m = np.asarray(matrix, dtype=float)
    n_channels, n_labels = m.shape
    names = [repr(str(label)) for label in labels] if labels is not None else [f"column {k}" for k in range(n_labels)]
    if n_channels < n_labels:
        raise InputError(f"{where}: {n_labels} labels but only {n_channels} channels; unmixing needs at least as "
                         "many channels as labels: image more channels or unmix fewer labels")
    norms = np.linalg.norm(m, axis=0)
    if not np.all(norms > 0):
        raise InputError(f"{where}: label {names[int(np.argmin(norms))]} is zero in every channel; fix the matrix")
    cond = scaled_condition_number(m)
    if cond > CONDITION_LIMIT:
        involved = _collinear(m / norms, names)
        what = (f"rank-deficient: labels {', '.join(involved)} are collinear" if not np.isfinite(cond) or cond > 1e15
                else f"labels {', '.join(involved)} are nearly collinear (condition number {cond:.2g}, above the "
                     f"limit {CONDITION_LIMIT:.0e})")
        raise InputError(f"{where}: {what}; they cannot be told apart: merge or drop one of them, or add channels "
                         "that separate them")
    if warn and cond > CONDITION_WARNING:
        involved = _collinear(m / norms, names)
        warnings.warn(f"{where}: labels {', '.join(involved)} are hard to tell apart (condition number {cond:.0f}, "
                      f"above {CONDITION_WARNING:.0f}); their abundances will be very noisy", InputWarning,
                      stacklevel=2)
    return cond


def _collinear(scaled: np.ndarray, names: list) -> list:
    """Names of the labels that weigh most in the nearest linear dependence of the columns."""
    direction = np.abs(np.linalg.svd(scaled)[2][-1])
    return [name for name, weight in zip(names, direction) if weight >= 0.25 * direction.max()]


def _is_grid(value, shape) -> bool:
    return (isinstance(value, list) and len(value) == shape[0]
            and all(isinstance(row, list) and len(row) == shape[1] for row in value))


def _names(data, key, where):
    value = data.get(key)
    if not isinstance(value, list) or not value or not all(isinstance(v, str) and v for v in value):
        raise InputError(f"{where}: '{key}' must be a non-empty list of names; fix the matrix file")
    if len(set(value)) != len(value):
        raise InputError(f"{where}: '{key}' has duplicate names {value}; names must be unique")
    return value


def _grid(data, key, shape, where, required):
    value = data.get(key)
    if value is None:
        if required:
            raise InputError(f"{where}: '{key}' is missing; fix the matrix file")
        return None
    if not _is_grid(value, shape):
        raise InputError(
            f"{where}: '{key}' must be {shape[0]} rows (channels) of {shape[1]} numbers (labels); fix the matrix file"
        )
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"{where}: '{key}' holds something that is not a number; fix the matrix file") from None
    if not np.all(np.isfinite(array)):
        raise InputError(f"{where}: '{key}' holds non-finite values; fix the matrix file")
    return array


def _vector(data, key, n, where, positive=False):
    value = data.get(key)
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != n or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        raise InputError(f"{where}: '{key}' must be null or a list of {n} numbers (one per channel); fix the matrix file")
    try:
        array = np.asarray(value, dtype=float)
    except OverflowError:  # an integer too large for a float
        array = np.array([np.inf])
    if not np.all(np.isfinite(array)) or (positive and np.any(array <= 0)):
        raise InputError(f"{where}: '{key}' must hold finite{' positive' if positive else ''} numbers; fix the matrix file")
    return array


def validate_matrix_dict(data, where: str = "matrix") -> None:
    """Check a parsed matrix file; raise InputError naming the first problem."""
    if not isinstance(data, dict):
        raise InputError(f"{where}: a matrix file must hold a JSON object; fix the matrix file")
    if data.get("format") != FORMAT:
        raise InputError(f"{where}: 'format' must be \"{FORMAT}\"; this is not a matrix file of this tool")
    if data.get("version") not in READABLE_VERSIONS or isinstance(data.get("version"), bool):
        raise InputError(f"{where}: unsupported version {data.get('version')!r}; this tool reads versions "
                         f"{', '.join(map(str, READABLE_VERSIONS))}")
    kind = data.get("kind")
    if kind not in KINDS:
        raise InputError(f"{where}: 'kind' must be one of {list(KINDS)}, not {kind!r}; fix the matrix file")
    channels = _names(data, "channels", where)
    labels = _names(data, "labels", where)
    shape = (len(channels), len(labels))
    primary = data.get("primary")
    if not isinstance(primary, dict) or set(primary) != set(labels):
        raise InputError(f"{where}: 'primary' must name one channel for each label {labels}; fix the matrix file")
    for label, channel in primary.items():
        if channel not in channels:
            raise InputError(f"{where}: primary channel {channel!r} of label {label!r} is not among 'channels'; fix the matrix file")
    matrix = _grid(data, "matrix", shape, where, required=True)
    for k, label in enumerate(labels):
        value = matrix[channels.index(primary[label]), k]
        if abs(value - 1.0) > _PRIMARY_TOLERANCE:
            raise InputError(
                f"{where}: column {label!r} is {value:g} at its primary channel {primary[label]!r}, not 1; "
                "normalise each column by its primary channel"
            )
    low = _grid(data, "ci95_low", shape, where, required=False)
    high = _grid(data, "ci95_high", shape, where, required=False)
    if (low is None) != (high is None):
        raise InputError(f"{where}: give both 'ci95_low' and 'ci95_high', or neither; fix the matrix file")
    if low is not None:
        if kind == "predicted":
            raise InputError(f"{where}: a predicted matrix has no confidence interval; set 'ci95_low'/'ci95_high' to null")
        tolerance = 1e-9 * np.maximum(1.0, np.abs(matrix))
        if np.any(low > matrix + tolerance) or np.any(high < matrix - tolerance):
            raise InputError(f"{where}: a 95 % interval does not contain its coefficient; fix 'ci95_low'/'ci95_high'")
    background = _vector(data, "background", shape[0], where)
    source = data.get("background_source")
    if source is not None and source not in BACKGROUND_SOURCES:
        raise InputError(f"{where}: 'background_source' must be one of {list(BACKGROUND_SOURCES)} or null; fix the matrix file")
    if (background is None) != (source is None):
        raise InputError(f"{where}: 'background' and 'background_source' must both be given or both null; fix the matrix file")
    _vector(data, "saturation", shape[0], where, positive=True)
    _validate_noise_model(data.get("noise_model"), shape[0], where)
    _validate_column_covariance(data.get("column_covariance"), shape, kind, where)
    for key in ("qc", "provenance"):
        if data.get(key) is not None and not isinstance(data.get(key), dict):
            raise InputError(f"{where}: '{key}' must be a JSON object; fix the matrix file")
    flags = (data.get("qc") or {}).get("flags")
    if flags is not None and not (isinstance(flags, list) and all(isinstance(f, str) for f in flags)):
        raise InputError(f"{where}: 'qc.flags' must be a list of messages (strings); fix the matrix file")


def _validate_noise_model(value, n_channels: int, where: str) -> None:
    if value is None:
        return
    if not isinstance(value, dict) or set(value) != {"read_variance", "gain", "source"}:
        raise InputError(f"{where}: 'noise_model' must be null or an object with 'read_variance', 'gain' and "
                         "'source'; fix the matrix file")
    for key in ("read_variance", "gain"):
        array = _vector(value, key, n_channels, f"{where}: noise_model")
        if array is None or np.any(array < 0):
            raise InputError(f"{where}: noise_model '{key}' must be {n_channels} numbers >= 0; fix the matrix file")
    if value["source"] not in NOISE_SOURCES:
        raise InputError(f"{where}: noise_model 'source' must be one of {list(NOISE_SOURCES)}; fix the matrix file")


def _noise_model(value) -> dict | None:
    if value is None:
        return None
    return {"read_variance": np.asarray(value["read_variance"], dtype=float),
            "gain": np.asarray(value["gain"], dtype=float), "source": value["source"]}


def _validate_column_covariance(value, shape, kind: str, where: str) -> None:
    if value is None:
        return
    if kind == "predicted":
        raise InputError(f"{where}: a predicted matrix has no 'column_covariance'; set it to null")
    n_channels, n_labels = shape
    if not (isinstance(value, list) and len(value) == n_labels and all(_is_grid(v, (n_channels, n_channels))
                                                                      for v in value)):
        raise InputError(f"{where}: 'column_covariance' must be {n_labels} (labels) matrices of {n_channels} x "
                         f"{n_channels} numbers; fix the matrix file")
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"{where}: 'column_covariance' holds something that is not a number; fix the matrix "
                         "file") from None
    if not np.all(np.isfinite(array)):
        raise InputError(f"{where}: 'column_covariance' holds non-finite values; fix the matrix file")
    if np.any(np.abs(array - np.swapaxes(array, 1, 2)) > 1e-9 * np.maximum(1e-300, np.abs(array).max())):
        raise InputError(f"{where}: 'column_covariance' is not symmetric; fix the matrix file")
    if np.any(np.linalg.eigvalsh(array) < -1e-9 * np.maximum(1e-300, np.abs(array).max())):
        raise InputError(f"{where}: 'column_covariance' is not positive semi-definite; fix the matrix file")


def _reject_constant(name):
    raise ValueError(f"non-standard JSON number {name}")


def load_matrix(path) -> BleedThroughMatrix:
    """Read and validate a matrix file.

    Raises
    ------
    InputError
        Naming the file and the first thing that is wrong with it.
    """
    path = Path(path)
    text = read_user_text(path, "matrix file", "check the file")
    try:
        data = json.loads(text, parse_constant=_reject_constant)
    except (json.JSONDecodeError, ValueError, RecursionError) as exc:
        detail = f"line {exc.lineno}" if isinstance(exc, json.JSONDecodeError) else str(exc)
        raise InputError(f"{path}: not valid JSON ({detail}); fix or re-create the matrix file") from None
    return BleedThroughMatrix.from_dict(data, where=str(path))

