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

from recursive import _givens

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


# LAPACK versions of the kernels, used when the C extension is not built (and tested
# against it either way). They allocate, so they cost more per call for small n.


def lapack_rank_ratio(r: np.ndarray) -> float:
    """Smallest ratio of a diagonal entry to its column's norm (upper triangle of ``r``)."""
    r = np.triu(r)
    d = np.abs(np.diagonal(r))
    norms = np.sqrt(np.einsum("ij,ij->j", r, r))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(norms > 0, d / np.where(norms > 0, norms, 1.0), 0.0)
    return float(ratio.min()) if ratio.size else 1.0


def lapack_update(r, z, phi, y) -> float:
    """Rotate the row ``[phi, y]`` into ``[r | z]``; return the residual entry ``e``."""
    n = r.shape[0]
    a = np.empty((n + 1, n + 1), order="F")
    a[:n, :n] = np.triu(r)
    a[:n, n] = z
    a[n, :n] = phi
    a[n, n] = y
    qr, tau, _work, info = _dgeqrf(a, overwrite_a=1)
    if info != 0:  # pragma: no cover - only on invalid LAPACK arguments
        raise np.linalg.LinAlgError(f"dgeqrf failed with info={info}")
    out = np.triu(qr)
    # The kernels' e has the sign of the innovation: the whole orthogonal change, each
    # reflection with tau != 0 (det -1) and the row negations below, must have det +1.
    sign = np.where(np.diagonal(out)[:n] < 0.0, -1.0, 1.0)
    out[:n] *= sign[:, None]
    e = float(out[n, n])
    if (np.count_nonzero(tau) + np.count_nonzero(sign < 0.0)) % 2:
        e = -e
    r[...] = np.where(np.triu(np.ones((n, n), bool)), out[:n, :n], r)
    z[...] = out[:n, n]
    phi[...] = 0.0
    return e


def lapack_stabilize(r, z, r0, z0, delta) -> None:
    """``[r | z] <- factor of [sqrt(d) r, sqrt(d) z; sqrt(1-d) diag(r0), sqrt(1-d) z0]``."""
    n = r.shape[0]
    if n == 0:
        return
    a = np.zeros((2 * n, n + 1), order="F")
    s, c = math.sqrt(delta), math.sqrt(1.0 - delta)
    a[:n, :n] = np.triu(r) * s
    a[:n, n] = z * s
    a[n:, :n] = np.diag(r0 * c)
    a[n:, n] = z0 * c
    out = _positive_rows(qr_r(a)[:n])
    r[...] = np.where(np.triu(np.ones((n, n), bool)), out[:, :n], r)
    z[...] = out[:, n]


def lapack_random_walk(r, z, c) -> None:
    """Time update for a random walk with covariance ``c I`` (see ``_givens.random_walk``).

    ``U`` (lower triangular, ``U^T U = I + c R R^T``) comes from a QR factorization of
    ``[I; sqrt(c) R^T]`` with its columns reversed, reversed back; then ``R' = U^{-T} R``.
    """
    n = r.shape[0]
    if n == 0:
        return
    ru = np.triu(r)
    a = np.empty((2 * n, n), order="F")
    a[:n] = np.eye(n)
    a[n:] = math.sqrt(c) * ru.T
    u = qr_r(a[:, ::-1].copy(order="F"))[::-1, ::-1]
    u *= np.where(np.diagonal(u) < 0.0, -1.0, 1.0)[:, None]
    rhs = np.empty((n, n + 1), order="F")
    rhs[:, :n] = ru
    rhs[:, n] = z
    x, info = _dtrtrs(u, rhs, lower=1, trans=1)
    if info != 0:  # pragma: no cover - U has a diagonal >= 1
        raise np.linalg.LinAlgError(f"singular factor in random_walk (info={info})")
    x[:, :n] = np.triu(x[:, :n])
    x = _positive_rows(x)
    r[...] = np.where(np.triu(np.ones((n, n), bool)), x[:, :n], r)
    z[...] = x[:, n]


def lapack_predict(r, z, phi) -> tuple[float, float]:
    """``(phi^T m, phi^T V phi)`` for one regressor; nan if ``r`` has a zero diagonal entry."""
    if r.shape[0] == 0:
        return 0.0, 0.0
    if np.any(np.diagonal(r) == 0.0):
        return math.nan, math.nan
    u = solve_upper_t(np.triu(r), phi)
    return float(u @ z), float(u @ u)


def _positive_rows(a: np.ndarray) -> np.ndarray:
    """Negate the rows of a triangular factor whose diagonal entry is negative."""
    k = min(a.shape)
    sign = np.where(np.diagonal(a[:k, :k]) < 0.0, -1.0, 1.0)
    a[:k] *= sign[:, None]
    return a


if _kernel is not None:
    # bound directly: a Python wrapper would cost more than the kernel for small n
    rank_ratio = _kernel.rank_ratio
    update = _kernel.update
    stabilize = _kernel.stabilize
    random_walk = _kernel.random_walk
    term_drift = getattr(_kernel, "term_drift", None) or _givens.term_drift
    predict = _kernel.predict
    stabilized_rows = _kernel.stabilized_rows
    stabilized_rows_many = (getattr(_kernel, "stabilized_rows_many", None)
                            or _givens.stabilized_rows_many)
    # None with a kernel built before it had this function: callers keep their own path
    whiten_norm = getattr(_kernel, "whiten_norm", None)
    scaled_row = getattr(_kernel, "scaled_row", None)
    outside = getattr(_kernel, "outside", None)
    whiten_norms = getattr(_kernel, "whiten_norms", None) or _givens.whiten_norms
    scaled_rows = getattr(_kernel, "scaled_rows", None) or _givens.scaled_rows
    outside_rows = getattr(_kernel, "outside_rows", None) or _givens.outside_rows
else:
    rank_ratio = lapack_rank_ratio
    update = lapack_update
    stabilize = lapack_stabilize
    random_walk = lapack_random_walk
    # numpy already, and O(j n) per drifting weight: the reference serves as the fallback
    term_drift = _givens.term_drift
    predict = lapack_predict
    # vectorized numpy already: the reference serves as the fallback
    stabilized_rows = _givens.stabilized_rows
    stabilized_rows_many = _givens.stabilized_rows_many
    # the references in Python are no faster than the callers' own float paths
    whiten_norm = scaled_row = outside = None
    # the references are the array expressions the callers would otherwise write
    whiten_norms = _givens.whiten_norms
    scaled_rows = _givens.scaled_rows
    outside_rows = _givens.outside_rows


def full_rank(r: np.ndarray) -> bool:
    """Whether the upper-triangular ``r`` is numerically non-singular.

    The test is scale invariant per column: the diagonal entry of column ``i`` is the part
    of that column not explained by the columns before it, so it is compared with the
    column's own norm rather than with the largest diagonal entry. A regressor measured in
    units a million times larger than another is then not mistaken for a missing one.
    """
    return rank_ratio(r) > RANK_TOL
