"""How much noise each label's signal spreads into the others after unmixing, by brightness.

With the detector's photon-transfer noise (variance ``read_variance + gain x
signal`` per channel) the noise of an unmixed label depends on how bright
every label is. For the least-squares estimator ``L = pinv(M)``, a pixel
with abundances ``a`` gives label k the variance

    var_k(a) = floor_k^2 + sum_j S[j, k]^2 a_j,
    floor_k^2 = sum_c L[k, c]^2 read_variance[c],
    S[j, k] = sqrt(sum_c L[k, c]^2 gain[c] M[c, j]),

so ``S[j, k] sqrt(a_j)`` is the spread that label j's signal adds to label k.
This is the spillover-spreading matrix that Nguyen et al. (2013) define for
flow cytometry from single-stained controls, ``sqrt(var_pos - var_neg) /
sqrt(F_pos - F_neg)`` (the spread of k in j's bright population over that of
its negative one, per square root of j's brightness), here predicted from
the noise model; ``tests/test_uncertainty.py`` checks it against simulated
single-label control images measured that way. ``S[k, k]`` is the label's own
shot noise. The noise penalty of the matrix (``[(M^T M)^-1]_kk``, white
noise) becomes the brightness-aware ``floor`` and ``S``.

References
----------
.. [1] R. Nguyen, S. Perfetto, Y. D. Mahnke, P. Chattopadhyay and M.
   Roederer, "Quantifying spillover spreading for comparing instrument
   performance and aiding in multicolor panel design", Cytometry A
   83:306 (2013).
"""

from __future__ import annotations

import numpy as np

from .noise import noise_arrays


def spreading_matrix(matrix, noise: dict) -> tuple[np.ndarray, np.ndarray]:
    """(S, floor): the spillover-spreading matrix S (K x K; row j spreads into column k) and each
    label's read-noise floor (K,), both in abundance units (S per square root of one)."""
    m = np.asarray(matrix, dtype=np.float64)
    read, gain = noise_arrays(noise, m.shape[0])
    estimator = np.linalg.pinv(m)
    floor = np.sqrt((estimator**2) @ read)
    spread = np.sqrt(np.maximum(((estimator**2) * gain) @ m, 0.0)).T
    return spread, floor


def label_noise(matrix, noise: dict, abundances) -> np.ndarray:
    """Standard deviation (K,) of each unmixed label at the given abundances (K,)."""
    spread, floor = spreading_matrix(matrix, noise)
    a = np.maximum(np.asarray(abundances, dtype=np.float64), 0.0)
    return np.sqrt(floor**2 + (spread**2).T @ a)


def spreading_record(matrix, labels, noise: dict) -> dict:
    """The spreading figures as stored in a matrix file's ``qc`` and in the outputs' metadata."""
    spread, floor = spreading_matrix(matrix, noise)
    return {"labels": list(labels), "floor": [float(f) for f in floor], "matrix": spread.tolist(),
            "meaning": "standard deviation of label k = sqrt(floor[k]^2 + sum_j matrix[j][k]^2 x abundance j) "
                       "(least squares, abundance units)"}
