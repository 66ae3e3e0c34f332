"""Pearson r of two labels with the noise of unmixing taken out, and its uncertainty.

Unconstrained least-squares unmixing ``u = P y`` with ``P = (M^T M)^-1 M^T``
keeps noise symmetric (a dim label's abundance may go negative, as
compensated flow-cytometry data do; Roederer 2001), so the covariance of two
labels' abundances over a region is the covariance of their true signals
plus the mean noise covariance of unmixing:

    Cov(u) = Cov(s) + P diag(mean v) P^T,

where ``v_c`` is each pixel's noise variance in channel c from the
detector's photon-transfer line (variance = read variance + gain x signal;
:mod:`unmix.measure.noise`). Subtracting that expected noise covariance
(Lawson & Hanson 1974) de-attenuates r - Spearman's (1904) correction for
attenuation, generalised to the correlated noise of unmixing (Adler,
Pagakis & Parmryd 2008):

    r_c = (S_ab - N_ab) / sqrt((S_aa - N_aa)(S_bb - N_bb)).

Non-negative unmixing cannot be used for this: clipping a dim label at 0
where a bright label's shot noise spreads into it turns that noise into
positive signal that follows the bright label.

Uncertainty of r_c about the labels' true r in this region, from three
sources added in quadrature:

- detector noise: first-order (delta-method) propagation of the sampling
  covariance of the three second moments, computed exactly from each
  pixel's noise covariance (Gaussian fourth moments);
- the matrix: r_c recomputed for joint draws of the matrix from its
  measured column covariances (the moments of any unmixing follow from the
  channels' moments, so a draw costs no pass over the pixels);
- the noise model itself: a relative error of its variances (smaller when
  it was measured from controls and a dark frame than when it is estimated
  from the image).

The interval is formed on Fisher's z scale (atanh r), where a correlation
near +-1 is not squeezed against its bound (Fisher 1915).

The interval covers this region's labels as imaged; it does not cover how
much r varies between fields, cells or specimens (compare those directly).

References
----------
.. [1] C. Spearman, "The proof and measurement of association between two
   things", Am. J. Psychol. 15:72-101 (1904).
.. [2] J. Adler, S. N. Pagakis and I. Parmryd, "Replicate-based noise
   corrected correlation for accurate measurements of colocalization",
   J. Microsc. 230:121-133 (2008).
.. [3] M. Roederer, "Spectral compensation for flow cytometry: visualization
   artifacts, limitations, and caveats", Cytometry 45:194-205 (2001).
.. [4] R. A. Fisher, "Frequency distribution of the values of the correlation
   coefficient in samples from an indefinitely large population",
   Biometrika 10:507-521 (1915).
.. [5] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*,
   Prentice-Hall (1974).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

_Z95 = 1.959963984540054  # normal quantile of a two-sided 95 % interval
# Relative standard error of the noise model's variances, by where it came from (a rule of this
# tool; the calibration benchmark checks that intervals built with it cover the truth).
NOISE_MODEL_RELATIVE_SD = {"controls and dark frame": 0.03, "controls": 0.05, "image": 0.10}
MIN_PIXELS_FOR_INTERVAL = 100


@dataclass(frozen=True)
class CorrectedCorrelation:
    """Noise-corrected Pearson r of one pair of abundances over one region.

    Attributes
    ----------
    r : float or None
        The corrected r; None when a label shows no variance above its noise.
    plain_r : float or None
        Pearson r of the abundances as they are.
    adjusted_r : float or None
        (S_ab - N_ab) / sqrt(S_aa S_bb): the plain r with the expected noise
        covariance removed from the numerator only. Independently shifted
        copies carry no noise covariance, so this, not the plain r, is what a
        randomisation test compares them with.
    adjusted_spread : float
        Standard deviation of the errors `adjusted_r` carries that shifted
        copies do not: the matrix's measurement error (a leftover of one label
        in the other moves with that label), the noise model's error, and the
        excess of the pixel-aligned noise over the shifted one (the unmixed
        noise of a dim label is largest where a bright label is).
    interval : (float, float) or None
        95 % interval of `r` (see the module docstring for what it covers).
    sd_noise, sd_matrix, sd_noise_model : float
        The three parts of the interval's standard error.
    noise_share : (float, float)
        Share of each label's variance that is expected noise (N_aa / S_aa, N_bb / S_bb).
    n_pixels : int
    note : str
    """

    r: float | None
    plain_r: float | None
    adjusted_r: float | None
    interval: tuple | None
    adjusted_spread: float
    sd_noise: float
    sd_matrix: float
    sd_noise_model: float
    noise_share: tuple
    n_pixels: int
    note: str = ""

    def to_dict(self) -> dict:
        return {"pearson_noise_corrected": self.r, "pearson_noise_corrected_interval":
                None if self.interval is None else [float(v) for v in self.interval],
                "pearson_noise_adjusted": self.adjusted_r, "pearson_noise_adjusted_spread": self.adjusted_spread,
                "standard_error_parts": {
                    "noise": self.sd_noise, "matrix": self.sd_matrix, "noise_model": self.sd_noise_model},
                "noise_share": [float(v) if np.isfinite(v) else None for v in self.noise_share], "note": self.note}


_R_MAX = 0.9999


def _fisher_z(r):
    """Fisher's z = atanh(r), r held inside +-0.9999 (Fisher 1915)."""
    return np.arctanh(np.clip(r, -_R_MAX, _R_MAX))


def unmixing_rows(matrix: np.ndarray) -> np.ndarray:
    """``P = (M^T M)^-1 M^T`` (K, C), the unconstrained least-squares unmixing, by SVD (numpy pinv)."""
    return np.linalg.pinv(np.asarray(matrix, dtype=np.float64))


def _moments(rows: np.ndarray, channel_mean_cov: np.ndarray, mean_variance: np.ndarray):
    """(S_aa, S_bb, S_ab) and (N_aa, N_bb, N_ab) for unmixing rows (2, C)."""
    s = rows @ channel_mean_cov @ rows.T
    n = rows @ (mean_variance[:, None] * rows.T)
    return np.array([s[0, 0], s[1, 1], s[0, 1]]), np.array([n[0, 0], n[1, 1], n[0, 1]])


def _corrected(s: np.ndarray, n: np.ndarray, floor=(0.0, 0.0)):
    """r_c and the corrected moments; None when a label's variance above noise is not above `floor`."""
    c = s - n
    if not (c[0] > floor[0] and c[1] > floor[1]):
        return None, c
    return float(np.clip(c[2] / np.sqrt(c[0] * c[1]), -1.0, 1.0)), c


def _gradient(c: np.ndarray, r: float) -> np.ndarray:
    """d r / d (C_aa, C_bb, C_ab)."""
    return np.array([-r / (2 * c[0]), -r / (2 * c[1]), 1 / np.sqrt(c[0] * c[1])])


class ChannelSums:
    """Count, channel means, centred channel cross products and summed noise variances over a region,
    added chunk by chunk (merged with Chan's parallel update) and mergeable."""

    def __init__(self, n_channels: int):
        self.n = 0
        self.mean = np.zeros(n_channels)
        self.m2 = np.zeros((n_channels, n_channels))
        self.variance_sum = np.zeros(n_channels)

    def add(self, signal: np.ndarray, variance: np.ndarray) -> None:
        n = signal.shape[1]
        if n == 0:
            return
        mean = signal.mean(axis=1)
        centred = signal - mean[:, None]
        total = self.n + n
        delta = mean - self.mean
        self.m2 += centred @ centred.T + np.outer(delta, delta) * self.n * n / total
        self.mean += delta * n / total
        self.n = total
        self.variance_sum += variance.sum(axis=1)

    def add_plane(self, signal: np.ndarray, variance: np.ndarray, mask: np.ndarray,
                  reference: np.ndarray | None = None) -> None:
        """Add the masked pixels of a plane (C, Y, X), in one compiled pass; the sums are taken about
        `reference` (a point near the data, for their precision; default their own mean)."""
        from .plane_pass import channel_sums

        if not mask.any():
            return
        if reference is None:
            reference = signal[:, mask].mean(axis=1) if self.n == 0 else self.mean
        c = signal.shape[0]
        sums = channel_sums(np.ascontiguousarray(signal, dtype=np.float64),
                            np.ascontiguousarray(variance, dtype=np.float64), mask, np.asarray(reference, float))
        n = sums[0]
        shifted = sums[1:1 + c] / n
        m2 = sums[1 + c:1 + c + c * c].reshape(c, c) - n * np.outer(shifted, shifted)
        other = ChannelSums(c)
        other.n, other.mean, other.m2, other.variance_sum = int(n), reference + shifted, m2, sums[1 + c + c * c:]
        self.merge(other)

    def merge(self, other: "ChannelSums") -> None:
        if other.n == 0:
            return
        total = self.n + other.n
        delta = other.mean - self.mean
        self.m2 += other.m2 + np.outer(delta, delta) * self.n * other.n / total
        self.mean += delta * other.n / total
        self.n = total
        self.variance_sum += other.variance_sum

    @property
    def covariance(self) -> np.ndarray:
        return self.m2 / max(self.n, 1)

    @property
    def mean_variance(self) -> np.ndarray:
        return self.variance_sum / max(self.n, 1)


class NoiseSums:
    """Per-voxel sums for the sampling covariance of the three second moments of two unmixed labels
    (fixed unmixing `rows`), added chunk by chunk and mergeable.

    For Gaussian noise e with covariance G and fixed signal s, the centred cross product
    u_x u_y = (s_x + e_x)(s_y + e_y) has covariance with u_z u_w of
    s_x s_z G_yw + s_x s_w G_yz + s_y s_z G_xw + s_y s_w G_xz + G_xz G_yw + G_xw G_yz.
    With s_x s_z replaced by its unbiased estimate u_x u_z - G_xz this becomes
    u_x u_z G_yw + u_x u_w G_yz + u_y u_z G_xw + u_y u_w G_xz - G_xz G_yw - G_xw G_yz,
    summed over the voxels. Its parts are kept as raw sums about a fixed reference point (the first
    chunk's mean), so that the region's own mean can be taken out at the end.
    """

    _PAIRS = ((0, 0), (1, 1), (0, 1))  # index 0: aa, 1: bb, 2: ab

    def __init__(self, rows: np.ndarray, reference: np.ndarray | None = None):
        self.rows = np.asarray(rows, dtype=np.float64)
        self.reference = None if reference is None else np.asarray(reference, dtype=np.float64)
        self.n = 0
        self.u = np.zeros(2)                # sum u
        self.g = np.zeros(3)                # sum g_r
        self.ug = np.zeros((2, 3))          # sum u_p g_r
        self.uug = np.zeros((3, 3))         # sum u_p u_q g_r, pair pq in _PAIRS
        self.gg = np.zeros((3, 3))          # sum g_r g_s

    def add(self, signal: np.ndarray, variance: np.ndarray) -> None:
        """Add pixels given as (C, N) arrays."""
        self.add_plane(signal[:, None, :], variance[:, None, :], np.ones((1, signal.shape[1]), bool))

    def add_plane(self, signal: np.ndarray, variance: np.ndarray, mask: np.ndarray) -> None:
        """Add the masked pixels of a plane (C, Y, X), in one compiled pass."""
        from .plane_pass import noise_sums

        if not mask.any():
            return
        if self.reference is None:
            self.reference = self.rows @ signal[:, mask].mean(axis=1)
        sums = noise_sums(np.ascontiguousarray(signal, dtype=np.float64),
                          np.ascontiguousarray(variance, dtype=np.float64), mask, self.rows, self.reference)
        self.n += int(sums[0])
        self.u += sums[1:3]
        self.g += sums[3:6]
        self.ug += sums[6:12].reshape(2, 3)
        self.uug += sums[12:21].reshape(3, 3)
        self.gg += sums[21:30].reshape(3, 3)

    def merge(self, other: "NoiseSums") -> None:
        if other.n == 0:
            return
        if self.reference is None:
            self.reference = other.reference
        shift = other.reference - self.reference  # other's u = self's u - shift
        u = other.u + shift * other.n
        ug = other.ug + np.outer(shift, other.g)
        uug = other.uug.copy()
        for i, (p, q) in enumerate(self._PAIRS):
            uug[i] += shift[p] * other.ug[q] + shift[q] * other.ug[p] + shift[p] * shift[q] * other.g
        self.n += other.n
        self.u += u
        self.g += other.g
        self.ug += ug
        self.uug += uug
        self.gg += other.gg

    def moment_covariance(self) -> np.ndarray:
        """Sampling covariance (3, 3) of (S_aa, S_bb, S_ab), the moments taken about the region's mean."""
        n = self.n
        mean = self.u / n  # relative to the reference

        def centred(p, q, r):  # sum (u_p - mean_p)(u_q - mean_q) g_r
            i = self._PAIRS.index((min(p, q), max(p, q)))
            return (self.uug[i, r] - mean[q] * self.ug[p, r] - mean[p] * self.ug[q, r]
                    + mean[p] * mean[q] * self.g[r])

        def index(x, y):
            return 2 if x != y else x

        out = np.empty((3, 3))
        for i, (x, y) in enumerate(self._PAIRS):
            for j, (z, w) in enumerate(self._PAIRS[i:], start=i):
                total = (centred(x, z, index(y, w)) + centred(x, w, index(y, z)) + centred(y, z, index(x, w))
                         + centred(y, w, index(x, z)) - self.gg[index(x, z), index(y, w)]
                         - self.gg[index(x, w), index(y, z)])
                out[i, j] = out[j, i] = total / n**2
        return out

    def mean_g(self) -> np.ndarray:
        return self.g / self.n


def corrected_correlation(signal: np.ndarray, variance: np.ndarray, rows: np.ndarray, *,
                          row_draws: np.ndarray | None = None, noise_model_sd: float = 0.0
                          ) -> CorrectedCorrelation:
    """Noise-corrected r of two unmixed labels over a region, with its 95 % interval.

    Parameters
    ----------
    signal : ndarray (C, N)
        Background-subtracted (and flat-fielded) channel values of the N pixels of the region.
    variance : ndarray (C, N)
        Each pixel's noise variance in each channel, in the units of `signal`.
    rows : ndarray (2, C)
        The unmixing rows of the two labels (rows of :func:`unmixing_rows`); two rows that
        each select one channel give the channels themselves, without unmixing.
    row_draws : ndarray (D, 2, C), optional
        The same rows for D draws of the matrix (its measurement uncertainty).
    noise_model_sd : float
        Relative standard error of the noise variances.
    """
    signal = np.asarray(signal, dtype=np.float64)
    variance = np.asarray(variance, dtype=np.float64)
    channels = ChannelSums(signal.shape[0])
    channels.add(signal, variance)
    noise = NoiseSums(rows)
    noise.add(signal, variance)
    return corrected_from_sums(channels, noise, row_draws=row_draws, noise_model_sd=noise_model_sd)


def corrected_from_sums(channels: ChannelSums, noise: NoiseSums, *, row_draws: np.ndarray | None = None,
                        noise_model_sd: float = 0.0) -> CorrectedCorrelation:
    """:func:`corrected_correlation` from sums accumulated over a region of any size."""
    rows = noise.rows
    n_pixels = channels.n
    if n_pixels < 3:
        return CorrectedCorrelation(None, None, None, None, 0.0, 0.0, 0.0, 0.0, (np.nan, np.nan), n_pixels,
                                    f"only {n_pixels} pixels")
    channel_cov = channels.covariance
    mean_variance = channels.mean_variance
    s, n = _moments(rows, channel_cov, mean_variance)
    plain = s[2] / np.sqrt(s[0] * s[1]) if s[0] > 0 and s[1] > 0 else None
    adjusted = (s[2] - n[2]) / np.sqrt(s[0] * s[1]) if plain is not None else None
    share = tuple(float(n[i] / s[i]) if s[i] > 0 else float("nan") for i in (0, 1))
    moment_cov = noise.moment_covariance()
    # A label's variance above its noise must stand out from the error of that difference (1.96 of its
    # standard errors: detector noise and noise model), else its r would be noise divided by noise.
    floor = tuple(_Z95 * np.sqrt(max(moment_cov[i, i], 0.0) + (noise_model_sd * n[i]) ** 2) for i in (0, 1))
    r, c = _corrected(s, n, floor)
    drawn, drawn_adjusted = [], []
    for draw in [] if row_draws is None else row_draws:
        s_draw, n_draw = _moments(draw, channel_cov, mean_variance)
        r_draw, _ = _corrected(s_draw, n_draw)
        if r_draw is not None:
            drawn.append(r_draw)
        if s_draw[0] > 0 and s_draw[1] > 0:
            drawn_adjusted.append((s_draw[2] - n_draw[2]) / np.sqrt(s_draw[0] * s_draw[1]))
    adjusted_spread = 0.0
    if adjusted is not None:
        scale = np.sqrt(s[0] * s[1])
        g = noise.mean_g()
        # Pixel-aligned noise of the cross moment against the same noise with the pairing broken.
        shifted = ((s[0] - g[0]) * g[1] + (s[1] - g[1]) * g[0] + g[0] * g[1]) / n_pixels
        excess = max(moment_cov[2, 2] - shifted, 0.0) / scale**2
        matrix_part = np.var(drawn_adjusted, ddof=1) if len(drawn_adjusted) >= 2 else 0.0
        adjusted_spread = float(np.sqrt(excess + matrix_part + (n[2] * noise_model_sd / scale) ** 2))
    if r is None:
        return CorrectedCorrelation(None, plain, adjusted, None, adjusted_spread, 0.0, 0.0, 0.0, share, n_pixels,
                                    "a label shows no variance clearly above its expected noise here")
    note = ""
    gradient = _gradient(c, r)
    var_noise = max(float(gradient @ moment_cov @ gradient), 0.0)
    # A relative error of every noise variance moves all three N's in proportion.
    sd_model = abs(float(gradient @ n)) * noise_model_sd
    sd_matrix = float(np.std(drawn, ddof=1)) if len(drawn) >= 2 else 0.0
    z_matrix = float(np.std(_fisher_z(np.array(drawn)), ddof=1)) if len(drawn) >= 2 else 0.0
    interval = None
    if n_pixels >= MIN_PIXELS_FOR_INTERVAL:
        # On Fisher's z scale, where r's bound at +-1 does not squeeze the interval: the noise and
        # noise-model parts by the derivative of atanh, the matrix part from the draws' own z.
        slope = 1 / (1 - min(r * r, _R_MAX**2))
        sd_z = np.sqrt((var_noise + sd_model**2) * slope**2 + z_matrix**2)
        z = _fisher_z(r)
        interval = (float(np.tanh(z - _Z95 * sd_z)), float(np.tanh(z + _Z95 * sd_z)))
    else:
        note = f"only {n_pixels} pixels: too few for an interval (need {MIN_PIXELS_FOR_INTERVAL})"
    return CorrectedCorrelation(float(r), plain, adjusted, interval, adjusted_spread, float(np.sqrt(var_noise)),
                                sd_matrix, float(sd_model), share, n_pixels, note)
