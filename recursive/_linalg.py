"""The per-sample linear algebra of the square-root information form.

Every operation works in place on a C-contiguous float64 upper-triangular ``R`` (zeros
below the diagonal) and a vector ``z``. When the optional C extension
:mod:`recursive._kernel` is built it does the work (Givens rotations, no allocation);
otherwise LAPACK through scipy does, which costs more in call overhead for small ``n`` but
gives the same results to rounding. :mod:`recursive._givens` is the readable reference of
the kernel and is used by its tests.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.linalg import lapack

try:
    from recursive import _kernel
except ImportError:  # no compiler at install time: LAPACK fallback
    _kernel = None

HAVE_KERNEL = _kernel is not None

_dgeqrf = lapack.dgeqrf
_dtrtrs = lapack.dtrtrs

# A column whose diagonal entry is below this fraction of the column's norm carries no
# information beyond the columns before it: the weights are then not identified.
RANK_TOL = 1e-10


def qr_r(a: np.ndarray) -> np.ndarray:
    """Upper-triangular factor R of ``a = Q R`` (``a`` is overwritten)."""
    qr, _tau, _work, info = _dgeqrf(a, overwrite_a=1)
    if info != 0:  # pragma: no cover - only on invalid LAPACK arguments
        raise np.linalg.LinAlgError(f"dgeqrf failed with info={info}")
    k = min(a.shape)
    return np.triu(qr[:k])


def solve_upper(r: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``r x = b`` for upper-triangular ``r`` (new array)."""
    x, info = _dtrtrs(r, b, lower=0, trans=0)
    if info != 0:
        raise np.linalg.LinAlgError(f"singular triangular factor (info={info})")
    return x


def solve_upper_t(r: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``r^T x = b`` for upper-triangular ``r`` (new array)."""
    x, info = _dtrtrs(r, b, lower=0, trans=1)
    if info != 0:
        raise np.linalg.LinAlgError(f"singular triangular factor (info={info})")
    return x


if _kernel is not None:

    def rank_ratio(r: np.ndarray) -> float:
        return _kernel.rank_ratio(r)

    def update(r: np.ndarray, z: np.ndarray, phi: np.ndarray, y: float) -> float:
        """Rotate the row ``[phi, y]`` into ``[r | z]``; return the residual entry ``e``.

        ``phi`` is overwritten.
        """
        return _kernel.update(r, z, phi, y)

    def stabilize(r, z, r0, z0, delta: float) -> None:
        """``[r | z] <- factor of [sqrt(d) r, sqrt(d) z; sqrt(1-d) diag(r0), sqrt(1-d) z0]``."""
        _kernel.stabilize(r, z, r0, z0, delta)

    def random_walk(r, z, c: float) -> None:
        """Square-root information time update for a random walk with covariance ``c I``."""
        _kernel.random_walk(r, z, c)

    def predict(r, z, phi) -> tuple[float, float]:
        """``(phi^T m, phi^T V phi)`` for one regressor."""
        return _kernel.predict(r, z, phi)

else:

    def rank_ratio(r: np.ndarray) -> float:
        d = np.abs(np.diagonal(r))
        norms = np.sqrt(np.einsum("ij,ij->j", r, r))
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.where(norms > 0, d / np.where(norms > 0, norms, 1.0), 0.0)
        return float(ratio.min())

    def update(r, z, phi, y):
        n = r.shape[0]
        a = np.empty((n + 1, n + 1), order="F")
        a[:n, :n] = r
        a[:n, n] = z
        a[n, :n] = phi
        a[n, n] = y
        out = qr_r(a)
        r[...] = out[:n, :n]
        z[...] = out[:n, n]
        return float(out[n, n])

    def stabilize(r, z, r0, z0, delta):
        n = r.shape[0]
        a = np.zeros((2 * n, n + 1), order="F")
        s, c = math.sqrt(delta), math.sqrt(1.0 - delta)
        a[:n, :n] = r * s
        a[:n, n] = z * s
        a[n:, :n] = np.diag(r0 * c)
        a[n:, n] = z0 * c
        out = qr_r(a)
        r[...] = out[:n, :n]
        z[...] = out[:n, n]

    def random_walk(r, z, c):
        # SRIF time update: triangularize [[-w I, w I, 0], [R, 0, z]]; keep the lower-right block.
        n = r.shape[0]
        w = 1.0 / math.sqrt(c)
        a = np.zeros((2 * n, 2 * n + 1), order="F")
        idx = np.arange(n)
        a[idx, idx] = -w
        a[idx, n + idx] = w
        a[n:, :n] = r
        a[n:, 2 * n] = z
        out = qr_r(a)
        r[...] = out[n:2 * n, n:2 * n]
        z[...] = out[n:2 * n, 2 * n]

    def predict(r, z, phi):
        u = solve_upper_t(r, phi)
        return float(u @ z), float(u @ u)


def full_rank(r: np.ndarray) -> bool:
    """Whether the upper-triangular ``r`` is numerically non-singular.

    The test is scale invariant per column: the diagonal entry of column ``i`` is the part
    of that column not explained by the columns before it, so it is compared with the
    column's own norm rather than with the largest diagonal entry. A regressor measured in
    units a million times larger than another is then not mistaken for a missing one.
    """
    return rank_ratio(r) > RANK_TOL
