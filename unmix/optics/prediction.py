"""The predicted bleed-through matrix from spectra and optics, and ranking of set-ups.

The contract's formula, for label k and channel c (:mod:`unmix.optics.description`
describes the inputs):

- excitation of k by channel c's source: for a laser line at L with power P,
  ``X[c,k] = P L eps_k(L) T_ex(L) (1 - T_dc(L))`` (photon flux ~ power x
  wavelength; the dichroic reflects the excitation; without a dichroic its
  factor is dropped); for a source with a spectrum (LED, lamp, a laser with a
  bandwidth) the same integrand integrated over wavelength;
- detection of k in channel c: ``D[c,k] = QY_k integral E_k T_em T_dc Q``;
- signal: sequential ``S = X D g``; simultaneous ``S[c,k] = (sum of X over
  the distinct sources) D[c,k] g_c``, a source listed by several channels
  counting once (with the filters of the first channel that lists it);
  grouped acquisition (an extension) generalises both: channels of one group
  are imaged together, groups one after another; ``g_c`` = exposure x gain;
- primary channel of k: the label's ``primary``, else the channel where S is
  largest; ``M[c,k] = S[c,k] / S[primary(k), k]``.

``eps_k`` is the excitation spectrum scaled to peak 1 times the extinction
coefficient, ``E_k`` the emission spectrum scaled to unit area. The matrix
splits into a cross-excitation factor (X relative to the primary's) and an
emission bleed-through factor (D g relative to the primary's), whose product
it is. Everything is array products over (channels or labels) x wavelengths.

Approximations: filters and dichroics are taken at normal incidence; a
dichroic reflects what it does not transmit (no absorption); a laser line
without a bandwidth is a single wavelength; label spectra do not depend on
the environment; no re-absorption, saturation of the label or photobleaching.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..matrix import BleedThroughMatrix
from .description import Description

INVISIBLE = 1e-6


@dataclass(frozen=True)
class Prediction:
    """A predicted matrix with its parts.

    Attributes
    ----------
    matrix : BleedThroughMatrix
        Kind "predicted"; its ``qc`` holds the split and brightness.
    signal : ndarray (C, K)
        S, in relative units (photons detected per unit label concentration).
    excitation : ndarray (C, K)
        Excitation reaching label k while channel c records (after summing
        the sources imaged together).
    detection : ndarray (C, K)
        ``D[c,k] g_c``.
    """

    matrix: BleedThroughMatrix
    signal: np.ndarray
    excitation: np.ndarray
    detection: np.ndarray

    @property
    def excitation_factor(self) -> np.ndarray:
        return self._relative(self.excitation)

    @property
    def emission_factor(self) -> np.ndarray:
        return self._relative(self.detection)

    def _relative(self, values: np.ndarray) -> np.ndarray:
        m = self.matrix
        rows = [m.channels.index(m.primary[label]) for label in m.labels]
        reference = values[rows, np.arange(len(m.labels))]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(reference > 0, values / reference, 0.0)

    @property
    def relative_brightness(self) -> dict:
        """Signal of each label in its primary channel, relative to the brightest label's."""
        m = self.matrix
        rows = [m.channels.index(m.primary[label]) for label in m.labels]
        primary_signal = self.signal[rows, np.arange(len(m.labels))]
        return dict(zip(m.labels, (primary_signal / primary_signal.max()).tolist()))


def _curve_on(curve, nm, default: float) -> np.ndarray:
    return np.full(nm.shape, default) if curve is None else curve(nm)


def _groups(description: Description, acquisition: str) -> list[list[int]]:
    """Groups of channel indices imaged together."""
    n = len(description.channels)
    if acquisition == "sequential":
        return [[c] for c in range(n)]
    if acquisition == "simultaneous":
        return [list(range(n))]
    groups: dict = {}
    for c, channel in enumerate(description.channels):
        groups.setdefault(channel.group or f"\0{c}", []).append(c)
    return list(groups.values())


def predict(description: Description, acquisition: str | None = None) -> Prediction:
    """The predicted matrix of a description, for its own or the given acquisition mode.

    Raises
    ------
    InputError
        When a label is invisible in every channel, or the mode needs groups the file lacks.
    """
    acquisition = acquisition or description.acquisition
    if acquisition == "grouped" and not any(c.group for c in description.channels):
        raise InputError(f"{description.path}: --acquisition grouped, but no channel has a group; give group = "
                         "\"NAME\" per channel")
    nm = description.grid.nm
    grid = description.grid
    labels, channels = description.labels, description.channels
    # Label spectra: (K, W).
    eps = np.array([label.excitation(nm) for label in labels])
    peak = eps.max(axis=1, keepdims=True)
    eps = np.divide(eps, peak, out=np.zeros_like(eps), where=peak > 0)
    extinction = np.array([label.extinction for label in labels])
    emission = np.array([label.emission(nm) for label in labels])
    area = grid.integrate(emission)[:, None]
    if np.any(area <= 0):
        bad = labels[int(np.argmin(area))].name
        raise InputError(f"{description.path}: label {bad!r} emits nothing between {grid.start:g} and "
                         f"{grid.stop:g} nm; check its emission spectrum or the grid")
    emission = emission / area
    quantum_yield = np.array([label.quantum_yield for label in labels])

    # Channel curves: (C, W).
    t_ex = np.array([_curve_on(c.excitation_filter, nm, 1.0) for c in channels])
    has_dichroic = np.array([c.dichroic is not None for c in channels])
    t_dc = np.array([_curve_on(c.dichroic, nm, 1.0) for c in channels])
    reflect = np.where(has_dichroic[:, None], 1.0 - t_dc, 1.0)
    t_em = np.array([_curve_on(c.emission_filter, nm, 1.0) for c in channels])
    qe = np.array([_curve_on(c.detector, nm, 1.0) for c in channels])
    gain = np.array([c.exposure * c.gain for c in channels])

    # Excitation of each label by each channel's own source, with that channel's filters: (C, K).
    own = np.zeros((len(channels), len(labels)))
    for c, channel in enumerate(channels):
        source = channel.source
        if source.line_nm is not None:
            line = np.array([source.line_nm])
            ex_at_line = np.array([label.excitation(line)[0] for label in labels]) / peak[:, 0]
            throughput = _curve_on(channel.excitation_filter, line, 1.0)[0]
            if channel.dichroic is not None:
                throughput *= 1.0 - channel.dichroic(line)[0]
            own[c] = source.power_mw * source.line_nm * ex_at_line * extinction * throughput
        else:
            power = source.spectrum(nm)
            total = grid.integrate(power)
            if total <= 0:
                raise InputError(f"{description.path}: the source of channel {channel.name!r} emits nothing between "
                                 f"{grid.start:g} and {grid.stop:g} nm; check it or the grid")
            photons = source.power_mw * power / total * nm * t_ex[c] * reflect[c]
            own[c] = grid.integrate(photons[None, :] * eps) * extinction
    excitation = np.zeros_like(own)
    for group in _groups(description, acquisition):
        first_of: dict = {}
        for c in group:
            first_of.setdefault(channels[c].source.identity, c)
        excitation[group] = own[list(first_of.values())].sum(axis=0)

    detection = quantum_yield[None, :] * grid.integrate(
        (t_em * np.where(has_dichroic[:, None], t_dc, 1.0) * qe)[:, None, :] * emission[None, :, :]) * gain[:, None]
    signal = excitation * detection

    channel_names = description.channel_names
    primary = {}
    best = signal.max(axis=0)
    for k, label in enumerate(labels):
        # Below the out-of-band blocking of a good filter relative to the brightest label
        # (OD 6, common practice): what leaks through blocking, not a signal.
        if not best[k] > INVISIBLE * best.max():
            raise InputError(f"{description.path}: label {label.name!r} gives no signal in any channel (its spectra "
                             "overlap no source or filter); check its spectra and the channels")
        primary[label.name] = label.primary or channel_names[int(np.argmax(signal[:, k]))]
    rows = [channel_names.index(primary[label.name]) for label in labels]
    at_primary = signal[rows, np.arange(len(labels))]
    for k, label in enumerate(labels):
        if at_primary[k] <= 0:
            raise InputError(f"{description.path}: label {label.name!r} gives no signal in its primary channel "
                             f"{primary[label.name]!r}; choose another primary")
    matrix = signal / at_primary
    matrix[rows, np.arange(len(labels))] = 1.0
    prediction = Prediction(
        BleedThroughMatrix(kind="predicted", channels=tuple(channel_names), labels=tuple(description.label_names),
                           primary=primary, matrix=matrix),
        signal, excitation, detection)
    return _with_qc(prediction, description, acquisition)


def _with_qc(prediction: Prediction, description: Description, acquisition: str) -> Prediction:
    from dataclasses import replace

    from ..io import provenance

    matrix = prediction.matrix
    qc = {
        "excitation_factor": prediction.excitation_factor.tolist(),
        "emission_factor": prediction.emission_factor.tolist(),
        "relative_brightness": prediction.relative_brightness,
        "acquisition": acquisition,
        "noise_penalty": dict(zip(matrix.labels, map(float, matrix.noise_penalty()))),
        "condition_number": matrix.condition_number(),
    }
    record = {"command": "prediction", "description": str(description.path), "created": provenance.utc_now(),
              "software": provenance.software(), "grid_nm": [description.grid.start, description.grid.stop,
                                                              description.grid.step]}
    return replace(prediction, matrix=replace(matrix, qc=qc, provenance=record))


def largest_off_diagonal(matrix: BleedThroughMatrix) -> tuple[float, str, str]:
    """The largest coefficient outside the primaries: (value, channel, label)."""
    values = matrix.matrix.copy()
    for k, label in enumerate(matrix.labels):
        values[matrix.channels.index(matrix.primary[label]), k] = -np.inf
    c, k = np.unravel_index(np.argmax(values), values.shape)
    return float(values[c, k]), matrix.channels[c], matrix.labels[k]


def rank_setups(candidates) -> list[dict]:
    """Rank candidate set-ups by their worst leak, then by their worst noise penalty.

    `candidates`: (name, Description, acquisition or None) triples. Returns one
    dict per candidate, best first: name, acquisition, largest off-diagonal
    coefficient (value, channel, label), largest noise penalty (value, label)
    and the condition number.
    """
    rows = []
    for name, description, acquisition in candidates:
        prediction = predict(description, acquisition)
        matrix = prediction.matrix
        leak, channel, label = largest_off_diagonal(matrix)
        penalty = matrix.noise_penalty()
        worst = int(np.argmax(penalty))
        rows.append({"name": name, "acquisition": acquisition or description.acquisition,
                     "largest_leak": leak, "leak_channel": channel, "leak_label": label,
                     "largest_noise_penalty": float(penalty[worst]), "penalty_label": matrix.labels[worst],
                     "condition_number": matrix.condition_number(), "matrix": matrix})
    return sorted(rows, key=lambda row: (row["largest_leak"], row["largest_noise_penalty"]))
