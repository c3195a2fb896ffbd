"""Where the inputs have been: :class:`InputRegion`, the weighted mean and covariance of the
inputs at accepted lab results and the Mahalanobis distance of new inputs from them."""

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg
from scipy.linalg import lapack

from recursive._linalg import whiten_norm as _whiten_norm
from recursive._linalg import whiten_norms as _whiten_norms
from recursive.detect._common import (
    SCHEMA,
    _check_state,
    _construct,
    _count,
    _decay,
    _get,
    _nonnegative,
    _positive,
)

_dtrtri = lapack.dtrtri
# up to this many rows, distances(rowwise=True) calls the C kernel once per row; above it,
# the dozen array operations of the elementwise path cost less than the calls
_KERNEL_ROWS = 48


@dataclass(frozen=True)
class RegionStep:
    """Result of :meth:`InputRegion.step`: distance (nan while too few updates), flag."""

    distance: float
    outside: bool


def _vector(name: str, x: Any, n: int) -> np.ndarray:
    try:
        v = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a vector of {n} numbers, got {x!r}") from None
    if v.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got shape {v.shape}: {x!r}")
    if not np.all(np.isfinite(v)):
        raise ValueError(f"{name} must be finite, got {x!r}")
    return v


class InputRegion:
    """Exponentially weighted mean and covariance of the inputs seen at accepted lab results.

    Parameters
    ----------
    n_inputs : int
        Length of the input vectors, ``>= 1``.
    half_life : float
        Half-life of the weights in updates, ``> 0``.
    limit : float
        Flag a point whose Mahalanobis distance exceeds this value, ``> 0``.
    ridge : float, default 1e-8
        Relative ridge added to the covariance before it is inverted, ``>= 0``.
    min_count : int, optional
        Updates needed before distances are given (:attr:`ready`); at least and by default
        ``n_inputs + 1``. A covariance from a handful of points calls almost any new point
        far away; until the region is ready a caller judges the inputs by their instrument
        ranges instead.

    Notes
    -----
    With :math:`w = 2^{-1/h}` and weight :math:`w^{n-i}` on the i-th of n updates, the mean and
    covariance are the reliability-weighted estimates

    .. math::

        \\bar x = \\frac{\\sum_i w_i x_i}{V_1}, \\quad
        C = \\frac{\\sum_i w_i (x_i - \\bar x)(x_i - \\bar x)^T}{V_1 - V_2/V_1}, \\quad
        V_1 = \\sum_i w_i,\\ V_2 = \\sum_i w_i^2,

    (the weighting of ``numpy.cov(..., aweights=...)``), updated recursively by West's
    weighted algorithm: after decaying the old sums by ``w``, with :math:`\\delta = x - \\bar x`,
    :math:`V_1 \\leftarrow V_1 + 1`, :math:`\\bar x \\leftarrow \\bar x + \\delta / V_1` and the
    scatter gains :math:`\\delta\\delta^T (V_1 - 1)/V_1`.

    The distance is :math:`d(x) = \\sqrt{(x - \\bar x)^T C_r^{-1} (x - \\bar x)}` computed by a
    Cholesky solve, with :math:`C_r = C + \\rho\\,\\mathrm{diag}(\\max(C_{jj}, f))` and floor
    :math:`f = 10^{-12}\\,\\mathrm{tr}(C)/n`. The ridge is relative to each input's own variance
    rather than to the trace alone so that inputs in very different units are regularised
    alike; the trace floor keeps an input that has not varied at all from making
    :math:`C_r` singular. It is nan until ``n_inputs + 1`` updates have been made, and when
    every input has been constant (zero trace) the distance is 0 at the mean and inf elsewhere.
    With ``min_count`` it stays nan until that many updates.
    """

    __slots__ = (
        "_n_inputs",
        "_half_life",
        "_limit",
        "_ridge",
        "_w",
        "_v1",
        "_v2",
        "_mean",
        "_scatter",
        "_count",
        "_chol",
        "_chol_inv",
        "_row_cache",
        "_kernel_cache",
        "_min_count",
    )

    def __init__(self, n_inputs: int, half_life: float, limit: float, ridge: float = 1e-8,
                 min_count: int | None = None) -> None:
        self._n_inputs = _count("n_inputs", n_inputs, 1)
        self._min_count = self._n_inputs + 1 if min_count is None else \
            max(self._n_inputs + 1, _count("min_count", min_count, 1))
        self._half_life = _positive("half_life", half_life)
        self._limit = _positive("limit", limit)
        self._ridge = _nonnegative("ridge", ridge)
        self._w = _decay(self._half_life)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {
            "n_inputs": self._n_inputs,
            "half_life": self._half_life,
            "limit": self._limit,
            "ridge": self._ridge,
            "min_count": self._min_count,
        }

    def reset(self) -> None:
        """Forget all inputs."""
        n = self._n_inputs
        self._v1 = 0.0
        self._v2 = 0.0
        self._mean = np.zeros(n)
        self._scatter = np.zeros((n, n))
        self._count = 0
        self._chol = None
        self._chol_inv = None
        self._row_cache = None
        self._kernel_cache = None

    @property
    def count(self) -> int:
        """Number of updates."""
        return self._count

    @property
    def ready(self) -> bool:
        """True once ``min_count`` updates have been made (distances are given)."""
        return self._count >= self._min_count

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean (copy)."""
        return self._mean.copy()

    @property
    def cov(self) -> np.ndarray:
        """Weighted covariance without ridge (nan before two updates)."""
        denom = self._v1 - self._v2 / self._v1 if self._v1 > 0.0 else 0.0
        if self._count < 2 or not denom > 0.0:
            return np.full((self._n_inputs, self._n_inputs), np.nan)
        return self._scatter / denom

    def update(self, x: Any) -> None:
        """Add one input vector (weight 1, older ones decayed)."""
        v = _vector("x", x, self._n_inputs)
        w = self._w
        old = w * self._v1
        self._v1 = old + 1.0
        self._v2 = w * w * self._v2 + 1.0
        delta = v - self._mean
        self._mean = self._mean + delta / self._v1
        self._scatter = w * self._scatter + np.outer(delta, delta) * (old / self._v1)
        self._count += 1
        self._chol = None
        self._chol_inv = None
        self._row_cache = None
        self._kernel_cache = None

    def _factor(self) -> Any:
        if self._chol is None:
            c = self.cov
            tr = float(np.trace(c))
            if not tr > 0.0:
                self._chol = "degenerate"
            else:
                floor = 1e-12 * tr / self._n_inputs
                reg = c + np.diag(self._ridge * np.maximum(np.diag(c), floor))
                try:
                    self._chol = np.linalg.cholesky(reg)
                except np.linalg.LinAlgError:
                    self._chol = "degenerate"
        return self._chol

    def distance(self, x: Any) -> float:
        """Mahalanobis distance of ``x`` from the weighted mean (nan until :attr:`ready`)."""
        v = _vector("x", x, self._n_inputs)
        if self._count < self._min_count:
            return math.nan
        chol = self._factor()
        d = v - self._mean
        if isinstance(chol, str):
            return 0.0 if not np.any(d) else math.inf
        y = scipy.linalg.solve_triangular(chol, d, lower=True, check_finite=False)
        return float(math.sqrt(float(y @ y)))

    def distances(self, X: Any, rowwise: bool = False) -> np.ndarray:
        """Mahalanobis distances of the rows of ``X`` (k, n_inputs) in one triangular solve.

        Same values as :meth:`distance` row by row (nan until :attr:`ready`).
        With ``rowwise`` each distance is computed by elementwise operations only, so its
        bits do not depend on the other rows of ``X`` (a matrix product may round a batch of
        one row differently from a batch of many).
        """
        A = np.asarray(X, dtype=float)
        if A.ndim != 2 or A.shape[1] != self._n_inputs:
            raise ValueError(f"X must have shape (k, {self._n_inputs}), got {np.shape(X)}")
        if self._count < self._min_count:
            return np.full(A.shape[0], math.nan)
        chol = self._factor()
        if isinstance(chol, str):
            return np.where(np.any((A - self._mean) != 0, axis=1), math.inf, 0.0)
        # one product with the inverse factor (kept with the factor) instead of a solve
        # with many right-hand sides, which costs LAPACK several times more for these
        # narrow factors; the distances agree with `distance` to rounding (tested)
        if self._chol_inv is None:
            inv, info = _dtrtri(chol, lower=1)
            if info != 0:  # pragma: no cover - the Cholesky factor has a positive diagonal
                raise np.linalg.LinAlgError(f"singular region factor (info={info})")
            self._chol_inv = inv
        if rowwise:
            inv = self._chol_inv
            if _whiten_norm is not None and len(A) <= _KERNEL_ROWS:
                # row by row in C, the operations of the array path in its order
                mean, inv_c = self._kernel_arrays()
                return np.array([_whiten_norm(x, mean, inv_c) for x in A.tolist()],
                                dtype=float)
            if len(A) <= 2:
                # plain floats for a row or two: the same operations in the same order as
                # the array path, hence the same bits, without its per-call overhead
                Ml = inv.tolist()
                D = (A - self._mean).tolist()
                return np.sqrt(np.array([_row_sq(d, Ml) for d in D], dtype=float))
            # every row at once: the C kernel, or its twin's elementwise array expression
            # (Y[r, i] = sum_j inv[i, j] D[r, j] in the order j = 0, 1, ...; the same bits)
            out = np.empty(len(A))
            mean, inv_c = self._kernel_arrays()
            _whiten_norms(out, np.ascontiguousarray(A, dtype=float), mean, inv_c)
            return out
        Y = self._chol_inv @ (A - self._mean).T
        return np.sqrt(np.einsum("ij,ij->j", Y, Y))

    def _kernel_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """The mean and the inverse factor as the C kernel reads them (C-ordered float64);
        the factor's inverse must be computed already."""
        arrays = self._kernel_cache
        if arrays is None:
            arrays = self._kernel_cache = (np.ascontiguousarray(self._mean, dtype=float),
                                           np.ascontiguousarray(self._chol_inv, dtype=float))
        return arrays

    def distance_row(self, x: list) -> float:
        """``distances([x], rowwise=True)[0]`` for one row given as a list of floats (same
        bits), in plain float arithmetic: the monitor's check of a single sample."""
        if len(x) != self._n_inputs:
            raise ValueError(f"x must have {self._n_inputs} values, got {x!r}")
        if self._count < self._n_inputs + 1:
            return math.nan
        cached = self._row_cache
        if cached is None:
            chol = self._factor()
            if isinstance(chol, str):
                cached = (self._mean.tolist(), None, None, None)
            else:
                if self._chol_inv is None:
                    inv, info = _dtrtri(chol, lower=1)
                    if info != 0:  # pragma: no cover - a Cholesky factor is non-singular
                        raise np.linalg.LinAlgError(f"singular region factor (info={info})")
                    self._chol_inv = inv
                if _whiten_norm is not None:
                    cached = (None, None, None, self._kernel_arrays())
                else:
                    Ml = self._chol_inv.tolist()
                    # each row of the (lower-triangular) inverse without its trailing zeros
                    cut = []
                    for m in Ml:
                        k = len(m)
                        while k > 1 and m[k - 1] == 0.0:
                            k -= 1
                        cut.append(m[:k])
                    cached = (self._mean.tolist(), Ml, cut, None)
            self._row_cache = cached
        mean, Ml, cut, arrays = cached
        if arrays is not None:
            # the same products and sums in the same order as the array path, in C
            return _whiten_norm(x, *arrays)
        d = [a - b for a, b in zip(x, mean, strict=True)]
        if Ml is None:
            return math.inf if any(v != 0 for v in d) else 0.0
        if math.isfinite(sum(d)):
            # a finite d_j times a zero adds a zero, which changes no sum (y + 0.0 == y,
            # a -0.0 only where y is 0 and then squared): the trailing terms are skipped
            return math.sqrt(_row_sq_cut(d, cut))
        return math.sqrt(_row_sq(d, Ml))

    def step(self, x: Any, learn: bool = False) -> RegionStep:
        """Distance of ``x`` from the region and the flag; then learn ``x`` if ``learn``."""
        dist = self.distance(x)
        if learn:
            self.update(x)
        return RegionStep(dist, bool(dist > self._limit))

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state; arrays as lists)."""
        return {
            "schema": SCHEMA,
            "kind": "input_region",
            "params": self.params(),
            "v1": self._v1,
            "v2": self._v2,
            "mean": self._mean.tolist(),
            "scatter": self._scatter.tolist(),
            "count": self._count,
        }

    @classmethod
    def from_state(cls, state: dict) -> "InputRegion":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "input_region")
        obj = _construct(cls, state["params"])
        n = obj._n_inputs
        obj._v1 = _nonnegative("v1", _get(state, "v1"))
        obj._v2 = _nonnegative("v2", _get(state, "v2"))
        obj._mean = _vector("mean", _get(state, "mean"), n)
        scatter = np.asarray(_get(state, "scatter"), dtype=float)
        if scatter.shape != (n, n) or not np.all(np.isfinite(scatter)):
            raise ValueError(f"scatter must be a finite {n}x{n} matrix, got {state['scatter']!r}")
        obj._scatter = scatter
        obj._count = _count("count", _get(state, "count"), 0)
        return obj


def _row_sq(d: list, Ml: list) -> float:
    """``sum_i (sum_j Ml[i][j] d[j])^2`` summed in index order, on floats."""
    acc = None
    for m in Ml:
        y = d[0] * m[0]
        for dj, mj in zip(d[1:], m[1:], strict=True):
            y = y + dj * mj
        acc = y * y if acc is None else acc + y * y
    return acc


def _row_sq_cut(d: list, cut: list) -> float:
    """:func:`_row_sq` with row ``i`` of the matrix cut after its last nonzero entry."""
    acc = None
    for m in cut:
        y = d[0] * m[0]
        for j in range(1, len(m)):
            y = y + d[j] * m[j]
        acc = y * y if acc is None else acc + y * y
    return acc
