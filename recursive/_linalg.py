"""Thin wrappers over the LAPACK routines the core calls on every step.

The wrappers exist because the generic ``scipy.linalg`` entry points spend several
microseconds checking their arguments, which is more than the arithmetic costs for the
small matrices (n <= 64) this package works with.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

_dgeqrf = lapack.dgeqrf
_dtrtrs = lapack.dtrtrs

# Relative size below which a diagonal entry of the square-root information factor is
# taken as zero: the column then carries no information beyond the ones before it.
RANK_TOL = 1e-10


def qr_r(a: np.ndarray) -> np.ndarray:
    """Return the upper-triangular factor R of ``a = Q R`` (``a`` is overwritten).

    The factor has ``min(rows, cols)`` rows; its diagonal may have either sign.
    """
    qr, _tau, _work, info = _dgeqrf(a, overwrite_a=1)
    if info != 0:  # pragma: no cover - only on invalid LAPACK arguments
        raise np.linalg.LinAlgError(f"dgeqrf failed with info={info}")
    k = min(a.shape)
    return np.triu(qr[:k])


def solve_upper(r: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``r x = b`` for upper-triangular ``r``."""
    x, info = _dtrtrs(r, b, lower=0, trans=0)
    if info != 0:
        raise np.linalg.LinAlgError(f"singular triangular factor (info={info})")
    return x


def solve_upper_t(r: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``r^T x = b`` for upper-triangular ``r``."""
    x, info = _dtrtrs(r, b, lower=0, trans=1)
    if info != 0:
        raise np.linalg.LinAlgError(f"singular triangular factor (info={info})")
    return x


def full_rank(r: np.ndarray) -> bool:
    """Whether the upper-triangular ``r`` is numerically non-singular.

    The test is scale invariant per column: the diagonal entry of column ``i`` is the part
    of that column not explained by the columns before it, so it is compared with the
    column's own norm rather than with the largest diagonal entry. A regressor measured in
    units a million times larger than another is then not mistaken for a missing one.
    """
    d = np.abs(np.diagonal(r))
    norms = np.sqrt(np.einsum("ij,ij->j", r, r))
    return bool(np.all(d > RANK_TOL * norms) and np.all(norms > 0.0))
