"""Compiled passes over one plane for :mod:`unmix.coloc.sums` and :mod:`unmix.coloc.corrected` (numba).

Each function reads a plane once and returns the sums its caller merges, so
that a stack costs a few memory-speed passes, not one numpy pass per sum.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# Layout of first_sums' result.
N, SA, SB, SAA, SBB, SAB, PAB, PAA, PBB, PA, PB, AMIN, AMAX, BMIN, BMAX, INTEGER = range(16)


@njit(cache=True, nogil=True)
def first_sums(a, b, mask, ref_a, ref_b):
    """Count, sums about (ref_a, ref_b), cross products, clipped sums, extremes and whether every A
    is a whole number, over the finite masked pixels of planes `a`, `b` (2-D, float64)."""
    out = np.zeros(16)
    out[AMIN] = np.inf
    out[AMAX] = -np.inf
    out[BMIN] = np.inf
    out[BMAX] = -np.inf
    out[INTEGER] = 1.0
    for y in range(a.shape[0]):
        for x in range(a.shape[1]):
            if not mask[y, x]:
                continue
            va = a[y, x]
            vb = b[y, x]
            if not (np.isfinite(va) and np.isfinite(vb)):
                continue
            da = va - ref_a
            db = vb - ref_b
            out[N] += 1.0
            out[SA] += da
            out[SB] += db
            out[SAA] += da * da
            out[SBB] += db * db
            out[SAB] += da * db
            pa = va if va > 0 else 0.0
            pb = vb if vb > 0 else 0.0
            out[PAB] += pa * pb
            out[PAA] += pa * pa
            out[PBB] += pb * pb
            out[PA] += pa
            out[PB] += pb
            if va < out[AMIN]:
                out[AMIN] = va
            if va > out[AMAX]:
                out[AMAX] = va
            if vb < out[BMIN]:
                out[BMIN] = vb
            if vb > out[BMAX]:
                out[BMAX] = vb
            if va != np.floor(va):
                out[INTEGER] = 0.0
    return out


@njit(cache=True, nogil=True)
def second_sums(a, b, mask, mean_a, mean_b, slope, intercept, first, step, bins):
    """Costes' binned sums into `bins` (candidates x 6, added to; skipped when slope <= 0) and the
    number of pixels whose deviations from the means share their sign (Li's ICQ)."""
    same = 0
    n_candidates = bins.shape[0]
    for y in range(a.shape[0]):
        for x in range(a.shape[1]):
            if not mask[y, x]:
                continue
            va = a[y, x]
            vb = b[y, x]
            if not (np.isfinite(va) and np.isfinite(vb)):
                continue
            ca = va - mean_a
            cb = vb - mean_b
            if ca * cb > 0:
                same += 1
            if slope <= 0:
                continue
            entry = max(va, (vb - intercept) / slope)
            # entry < T_j  <=>  j >= floor((entry - first) / step) + 1
            j = int(np.floor((entry - first) / step)) + 1
            if j < 0:
                j = 0
            if j >= n_candidates:
                continue  # above every candidate: never below both thresholds
            bins[j, 0] += 1.0
            bins[j, 1] += ca
            bins[j, 2] += cb
            bins[j, 3] += ca * ca
            bins[j, 4] += cb * cb
            bins[j, 5] += ca * cb
    return same


@njit(cache=True, nogil=True)
def third_sums(a, b, mask, t_a, t_b):
    """Manders sums at thresholds (t_a, t_b), values clipped at 0: A where B > t_b, B where A > t_a,
    A above both, A above its own, B above both, B above its own."""
    out = np.zeros(6)
    for y in range(a.shape[0]):
        for x in range(a.shape[1]):
            if not mask[y, x]:
                continue
            va = a[y, x]
            vb = b[y, x]
            if not (np.isfinite(va) and np.isfinite(vb)):
                continue
            pa = va if va > 0 else 0.0
            pb = vb if vb > 0 else 0.0
            above_a = va > t_a
            above_b = vb > t_b
            if above_b:
                out[0] += pa
                out[5] += pb
            if above_a:
                out[1] += pb
                out[3] += pa
            if above_a and above_b:
                out[2] += pa
                out[4] += pb
    return out


@njit(cache=True, nogil=True)
def noise_sums(signal, variance, mask, rows, reference):
    """For two unmixing rows (2, C): over the masked pixels of a plane (C, Y, X), with
    u = rows . signal - reference and g = (rows_a^2, rows_b^2, rows_a rows_b) . variance, the sums
    n, u (2), g (3), u_p g_r (2 x 3), u_p u_q g_r (pairs aa, bb, ab x 3), g_r g_s (3 x 3), flattened."""
    out = np.zeros(1 + 2 + 3 + 6 + 9 + 9)
    n_channels = signal.shape[0]
    for y in range(signal.shape[1]):
        for x in range(signal.shape[2]):
            if not mask[y, x]:
                continue
            u0 = -reference[0]
            u1 = -reference[1]
            g0 = 0.0
            g1 = 0.0
            g2 = 0.0
            for c in range(n_channels):
                s = signal[c, y, x]
                v = variance[c, y, x]
                u0 += rows[0, c] * s
                u1 += rows[1, c] * s
                g0 += rows[0, c] * rows[0, c] * v
                g1 += rows[1, c] * rows[1, c] * v
                g2 += rows[0, c] * rows[1, c] * v
            out[0] += 1.0
            out[1] += u0
            out[2] += u1
            out[3] += g0
            out[4] += g1
            out[5] += g2
            out[6] += u0 * g0
            out[7] += u0 * g1
            out[8] += u0 * g2
            out[9] += u1 * g0
            out[10] += u1 * g1
            out[11] += u1 * g2
            uu0 = u0 * u0
            uu1 = u1 * u1
            uu2 = u0 * u1
            out[12] += uu0 * g0
            out[13] += uu0 * g1
            out[14] += uu0 * g2
            out[15] += uu1 * g0
            out[16] += uu1 * g1
            out[17] += uu1 * g2
            out[18] += uu2 * g0
            out[19] += uu2 * g1
            out[20] += uu2 * g2
            out[21] += g0 * g0
            out[22] += g0 * g1
            out[23] += g0 * g2
            out[24] += g1 * g0
            out[25] += g1 * g1
            out[26] += g1 * g2
            out[27] += g2 * g0
            out[28] += g2 * g1
            out[29] += g2 * g2
    return out


@njit(cache=True, nogil=True)
def channel_sums(signal, variance, mask, reference):
    """Over the masked pixels of a plane (C, Y, X): the count, the sums of signal - reference (C), their
    cross products (C x C) and the sums of the noise variances (C), flattened in that order."""
    n_channels = signal.shape[0]
    out = np.zeros(1 + n_channels + n_channels * n_channels + n_channels)
    s = np.empty(n_channels)
    for y in range(signal.shape[1]):
        for x in range(signal.shape[2]):
            if not mask[y, x]:
                continue
            out[0] += 1.0
            for c in range(n_channels):
                s[c] = signal[c, y, x] - reference[c]
                out[1 + c] += s[c]
                out[1 + n_channels + n_channels * n_channels + c] += variance[c, y, x]
            for c in range(n_channels):
                for d in range(n_channels):
                    out[1 + n_channels + c * n_channels + d] += s[c] * s[d]
    return out


@njit(cache=True, nogil=True)
def spectral_inputs(a, b, mask, out):
    """The planes whose Fourier transforms the shift sums need, into `out` (2, 3 or 4, Y, X): A inside the
    mask (0 elsewhere), B, then B^2 and B inside the mask as far as `out` has planes; non-finite values
    as 0."""
    with_bb = out.shape[0] > 2
    with_mb = out.shape[0] > 3
    for y in range(a.shape[0]):
        for x in range(a.shape[1]):
            vb = b[y, x]
            if not np.isfinite(vb):
                vb = 0.0
            va = a[y, x]
            inside = mask[y, x] and np.isfinite(va)
            out[0, y, x] = va if inside else 0.0
            out[1, y, x] = vb
            if with_bb:
                out[2, y, x] = vb * vb
            if with_mb:
                out[3, y, x] = vb if mask[y, x] else 0.0


@njit(cache=True, nogil=True)
def accumulate_spectra(f_ma, f_b, f_bb, f_m, cross_ab, cross_mb, cross_mbb):
    """cross_ab += conj(F(m a)) F(b); cross_mb += conj(F(m)) F(b); cross_mbb += conj(F(m)) F(b^2)."""
    for y in range(f_ma.shape[0]):
        for x in range(f_ma.shape[1]):
            m = np.conj(f_m[y, x])
            cross_ab[y, x] += np.conj(f_ma[y, x]) * f_b[y, x]
            cross_mb[y, x] += m * f_b[y, x]
            cross_mbb[y, x] += m * f_bb[y, x]


@njit(cache=True, nogil=True)
def unmix_two(rows, signal):
    """Two least-squares abundances (2, Y, X) of a plane (C, Y, X): rows (2, C) times each pixel."""
    out = np.zeros((2, signal.shape[1], signal.shape[2]))
    for c in range(signal.shape[0]):
        r0 = rows[0, c]
        r1 = rows[1, c]
        for y in range(signal.shape[1]):
            for x in range(signal.shape[2]):
                s = signal[c, y, x]
                out[0, y, x] += r0 * s
                out[1, y, x] += r1 * s
    return out
