"""Basis functions phi(x) for linear-in-the-weights models y = w^T phi(x) + noise.

Every basis is built once from a list of :class:`Input` declarations (tag and instrument
range) and then evaluated many times, on a single feature vector or on a block of rows.
All per-term bookkeeping (exponent table, gather indices, range mapping) is computed at
construction so that evaluation is a handful of vectorized numpy operations.

A basis is configuration, not learned state: it is fully described by :meth:`Basis.to_dict`
and rebuilt by :func:`from_dict`.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from numbers import Integral, Real
from typing import Any

import numpy as np

from recursive._linalg import outside as _outside
from recursive._linalg import outside_rows as _outside_rows
from recursive._linalg import scaled_row as _scaled_row
from recursive._linalg import scaled_rows as _scaled_rows

__all__ = [
    "SCHEMA_VERSION",
    "FAMILIES",
    "MAX_TERMS",
    "Input",
    "Basis",
    "Identity",
    "Polynomial",
    "from_dict",
]

#: Version of the dictionary layout written by :meth:`Basis.to_dict`.
SCHEMA_VERSION = 1

#: One-dimensional polynomial families accepted by :class:`Polynomial`.
FAMILIES = ("legendre", "chebyshev", "monomial")

# The most terms a model may have: the C kernel's MAX_N (its R is then 8 MiB, and a lab
# result costs an eigendecomposition of that size), and a soft sensor with more terms than
# lab results in months is not identifiable.
MAX_TERMS = 1024

# Prefix used in term names for a factor of degree >= 2 (None: written as "tag^k").
_NAME_PREFIX = {"legendre": "P", "chebyshev": "T", "monomial": None}


def _as_finite_float(value: Any, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, Real):
        raise ValueError(f"{what} must be a real number, got {value!r}")
    out = float(value)
    if not math.isfinite(out):
        raise ValueError(f"{what} must be finite, got {value!r}")
    return out


@dataclass(frozen=True)
class Input:
    """One measured input of a model: a tag and its declared instrument range.

    Parameters
    ----------
    tag : str
        Tag name, non-empty and without whitespace (for example ``"TI-104"``).
    lo, hi : float
        Finite instrument range with ``lo < hi``. Values are stored as Python floats.

    Raises
    ------
    ValueError
        If the tag is not a non-empty string without whitespace, or the range is not
        finite or not increasing.

    Notes
    -----
    The range only serves to scale inputs to :math:`[-1, 1]` (see :class:`Polynomial`)
    and to flag out-of-range readings; values outside it are still evaluated.
    """

    tag: str
    lo: float
    hi: float

    def __post_init__(self) -> None:
        if not isinstance(self.tag, str) or not self.tag:
            raise ValueError(f"tag must be a non-empty string, got {self.tag!r}")
        if any(c.isspace() for c in self.tag):
            raise ValueError(f"tag must not contain whitespace, got {self.tag!r}")
        lo = _as_finite_float(self.lo, f"lo of input {self.tag!r}")
        hi = _as_finite_float(self.hi, f"hi of input {self.tag!r}")
        if not lo < hi:
            raise ValueError(f"input {self.tag!r} needs lo < hi, got lo={lo!r}, hi={hi!r}")
        # frozen dataclass: normalise ints / numpy scalars to float so equality and
        # serialisation do not depend on how the caller spelled the numbers
        object.__setattr__(self, "lo", lo)
        object.__setattr__(self, "hi", hi)

    def to_dict(self) -> dict[str, Any]:
        """Return ``{"tag": ..., "lo": ..., "hi": ...}``."""
        return {"tag": self.tag, "lo": self.lo, "hi": self.hi}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Input:
        """Rebuild an input from :meth:`to_dict` output."""
        if not isinstance(d, Mapping):
            raise ValueError(f"input description must be a mapping, got {d!r}")
        missing = {"tag", "lo", "hi"} - set(d)
        if missing:
            raise ValueError(f"input description {d!r} lacks keys {sorted(missing)}")
        return cls(d["tag"], d["lo"], d["hi"])


def _check_inputs(inputs: Sequence[Input]) -> tuple[Input, ...]:
    if isinstance(inputs, Input | str | bytes) or not isinstance(inputs, Sequence):
        raise ValueError(f"inputs must be a sequence of Input, got {inputs!r}")
    out = tuple(inputs)
    if not out:
        raise ValueError("inputs must contain at least one Input, got an empty sequence")
    seen: set[str] = set()
    for item in out:
        if not isinstance(item, Input):
            raise ValueError(f"inputs must be Input instances, got {item!r}")
        if item.tag in seen:
            raise ValueError(f"duplicate input tag {item.tag!r}")
        seen.add(item.tag)
    return out


def _readonly(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


class Basis(ABC):
    """Common interface of all bases.

    Attributes
    ----------
    inputs : tuple of Input
        Declared inputs, in the column order expected in ``X``.
    tags : tuple of str
        ``tuple(inp.tag for inp in inputs)``.
    n_inputs : int
        Number of inputs ``d``.
    names : tuple of str
        One readable name per term, ``"1"`` for the constant.
    n_features : int
        Number of terms ``p = len(names)``.
    exponents : ndarray of int, shape (p, d)
        Degree of each input in each term (read-only).
    unpenalized : ndarray of bool, shape (p,)
        True for the constant term (read-only).

    Notes
    -----
    The constant term is marked unpenalized because a Gaussian prior
    :math:`w \\sim N(0, A^{-1})` with :math:`A = \\mathrm{diag}(\\alpha_j)` should not pull
    the intercept towards zero; :meth:`alpha_vector` therefore puts :math:`\\alpha_j = 0`
    (an improper flat prior) on it, which is the Bayesian reading of ridge regression with
    an unpenalized intercept.
    """

    kind: str = ""

    def __init__(self, inputs: Sequence[Input]) -> None:
        self.inputs: tuple[Input, ...] = _check_inputs(inputs)
        self.tags: tuple[str, ...] = tuple(inp.tag for inp in self.inputs)
        self.n_inputs: int = len(self.inputs)
        self._lo = _readonly(np.array([inp.lo for inp in self.inputs], dtype=np.float64))
        self._hi = _readonly(np.array([inp.hi for inp in self.inputs], dtype=np.float64))

    def _set_terms(self, exponents: np.ndarray, names: Sequence[str]) -> None:
        self.exponents: np.ndarray = _readonly(np.asarray(exponents, dtype=np.int64))
        self.names: tuple[str, ...] = tuple(names)
        self.n_features: int = len(self.names)
        self.unpenalized: np.ndarray = _readonly(~self.exponents.any(axis=1))

    # ------------------------------------------------------------------ evaluation
    def _as_rows(self, X: Any) -> tuple[np.ndarray, bool]:
        """Return ``X`` as a float64 (k, d) array and whether it was a single row."""
        try:
            A = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"X must be numeric, got {X!r}") from exc
        d = self.n_inputs
        if A.ndim == 1:
            if A.shape[0] != d:
                raise ValueError(f"X must have length {d} ({self.tags}), got shape {A.shape}")
            return A.reshape(1, d), True
        if A.ndim == 2:
            if A.shape[1] != d:
                raise ValueError(f"X must have {d} columns ({self.tags}), got shape {A.shape}")
            return A, False
        raise ValueError(f"X must have shape ({d},) or (k, {d}), got shape {A.shape}")

    @abstractmethod
    def _evaluate(self, X: np.ndarray) -> np.ndarray:
        """Design matrix (k, n_features) for validated float64 rows ``X`` of shape (k, d)."""

    def __call__(self, X: Any) -> np.ndarray:
        """Evaluate the basis.

        Parameters
        ----------
        X : array_like, shape (d,) or (k, d)
            One feature vector, or ``k`` rows, in the order of :attr:`inputs`.

        Returns
        -------
        ndarray of float64, shape (n_features,) or (k, n_features)

        Raises
        ------
        ValueError
            If ``X`` is not numeric or has the wrong shape.

        Notes
        -----
        Non-finite entries are not checked: a nan input gives nan in exactly the terms
        in which that input has a nonzero degree (the constant stays 1).
        """
        A, single = self._as_rows(X)
        out = self._evaluate(A)
        return out[0] if single else out

    def jacobian(self, x: Any) -> np.ndarray:
        """Derivatives of every term with respect to every input at one point.

        Parameters
        ----------
        x : array_like, shape (d,)
            One feature vector in engineering units, in the order of :attr:`inputs`.

        Returns
        -------
        ndarray of float64, shape (n_features, d)
            ``J[k, i] = d phi_k / d x_i`` at ``x``, per engineering unit of input ``i``.

        Notes
        -----
        For weights ``w`` the model's sensitivity to input ``i`` at ``x`` is
        :math:`\\partial y / \\partial x_i = \\sum_k w_k J_{ki}` (``w @ J``), in target
        units per input unit; for a basis of degree 1 it does not depend on ``x``.
        """
        A, single = self._as_rows(x)
        if not single:
            raise ValueError(f"jacobian takes one point of shape ({self.n_inputs},), got "
                             f"shape {np.shape(x)}")
        return self._jacobian(A[0])

    @abstractmethod
    def _jacobian(self, x: np.ndarray) -> np.ndarray:
        """``jacobian`` for a validated float64 point of shape (d,)."""

    def out_of_range(self, X: Any) -> np.ndarray:
        """Flag readings outside the declared instrument ranges.

        Parameters
        ----------
        X : array_like, shape (d,) or (k, d)

        Returns
        -------
        ndarray of bool, same shape as ``X``
            True where ``x_i < lo_i`` or ``x_i > hi_i``.

        Notes
        -----
        The range is closed, so readings exactly at ``lo`` or ``hi`` are in range.
        A nan compares false with both bounds and is therefore *not* flagged; detecting
        missing values is left to the caller.
        """
        A, single = self._as_rows(X)
        flags = (A < self._lo) | (A > self._hi)
        return flags[0] if single else flags

    def row_terms(self, x: list) -> np.ndarray:
        """``self(np.array([x]))`` for one row given as a list of floats: shape (1, n).

        The affine bases (identity, degree 1) compute it in plain float arithmetic, the
        same operations as the array path (same bits); the others take the array path.
        """
        return self._evaluate(np.array([x], dtype=np.float64))

    def row_out_of_range(self, x: list) -> bool:
        """``out_of_range(x).any()`` for one row given as a list of floats, without arrays."""
        if _outside is not None:
            return _outside(x, self._lo, self._hi)
        lim = self.__dict__.get("_limits")
        if lim is None:
            lim = self.__dict__["_limits"] = tuple(zip(self._lo.tolist(), self._hi.tolist(),
                                                       strict=True))
        for v, (lo, hi) in zip(x, lim, strict=True):
            if v < lo or v > hi:
                return True
        return False

    def rows_out_of_range(self, X: Any) -> int:
        """Number of rows of ``X`` (k, d) with at least one reading :meth:`out_of_range`.

        One pass over the readings (in C when the kernel is built).
        """
        A, _single = self._as_rows(X)
        if not len(A):
            return 0
        return _outside_rows(np.empty(len(A)), np.ascontiguousarray(A), self._lo, self._hi)

    def rows_out_of_range_flags(self, X: Any) -> np.ndarray | None:
        """Per row of ``X`` (k, d), 1.0 if a reading is :meth:`out_of_range` and 0.0 if
        not; None when no row is."""
        A, _single = self._as_rows(X)
        flags = np.empty(len(A))
        if not len(A) or not _outside_rows(flags, np.ascontiguousarray(A), self._lo,
                                           self._hi):
            return None
        return flags

    # ------------------------------------------------------------------ prior helper
    def alpha_vector(self, alpha: Any) -> np.ndarray:
        """Per-term prior precisions.

        Parameters
        ----------
        alpha : float or array_like, shape (n_features,)
            A scalar precision shared by all penalized terms, or one value per term.

        Returns
        -------
        ndarray of float64, shape (n_features,)
            For a scalar: ``alpha`` on every term and 0.0 on :attr:`unpenalized` terms.
            For an array: a float64 copy of it, unchanged.

        Raises
        ------
        ValueError
            If a value is negative or not finite, or the array has the wrong length.

        Notes
        -----
        The prior is :math:`p(w) \\propto \\exp(-\\tfrac12 \\sum_j \\alpha_j w_j^2)`; a zero
        precision leaves that weight unconstrained.
        """
        if np.ndim(alpha) == 0:
            a = _as_finite_float(alpha, "alpha")
            if a < 0.0:
                raise ValueError(f"alpha must be >= 0, got {alpha!r}")
            out = np.full(self.n_features, a, dtype=np.float64)
            out[self.unpenalized] = 0.0
            return out
        try:
            arr = np.array(alpha, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"alpha must be numeric, got {alpha!r}") from exc
        if arr.shape != (self.n_features,):
            raise ValueError(
                f"alpha must be a scalar or have shape ({self.n_features},), got shape {arr.shape}"
            )
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"alpha must be finite, got {arr!r}")
        if np.any(arr < 0.0):
            raise ValueError(f"alpha must be >= 0, got {arr!r}")
        return arr

    # ------------------------------------------------------------------ spec
    def _spec(self) -> dict[str, Any]:
        """Constructor arguments beyond ``inputs``, as plain data."""
        return {}

    def to_dict(self) -> dict[str, Any]:
        """Plain-data description (``kind``, ``schema_version``, ``inputs``, options)."""
        d: dict[str, Any] = {
            "kind": self.kind,
            "schema_version": SCHEMA_VERSION,
            "inputs": [inp.to_dict() for inp in self.inputs],
        }
        d.update(self._spec())
        return d

    def _key(self) -> tuple[Any, ...]:
        return (type(self), self.inputs, tuple(sorted(self._spec().items())))

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Basis):
            return NotImplemented
        return self._key() == other._key()

    def __hash__(self) -> int:
        return hash(self._key())

    def __repr__(self) -> str:
        opts = "".join(f", {k}={v!r}" for k, v in self._spec().items())
        return f"{type(self).__name__}({list(self.inputs)!r}{opts})"


class Identity(Basis):
    """Affine basis in raw engineering units: ``phi(x) = [1, x_1, ..., x_d]``.

    Parameters
    ----------
    inputs : sequence of Input

    Notes
    -----
    No scaling is applied, so the weights read directly as sensitivities
    :math:`\\partial y / \\partial x_i` in engineering units. Term names are ``"1"``
    followed by the tags; :math:`p = d + 1`.
    """

    kind = "identity"

    def __init__(self, inputs: Sequence[Input]) -> None:
        super().__init__(inputs)
        d = self.n_inputs
        exps = np.vstack([np.zeros((1, d), dtype=np.int64), np.eye(d, dtype=np.int64)])
        self._set_terms(exps, ("1", *self.tags))

    def _evaluate(self, X: np.ndarray) -> np.ndarray:
        out = np.empty((X.shape[0], self.n_features), dtype=np.float64)
        out[:, 0] = 1.0
        out[:, 1:] = X
        return out

    def row_terms(self, x: list) -> np.ndarray:
        return np.array([[1.0, *x]], dtype=np.float64)

    def _jacobian(self, x: np.ndarray) -> np.ndarray:
        return self.exponents.astype(np.float64)  # row 0 zeros, then the identity


def _graded_exponents(d: int, degree: int, interactions: bool) -> np.ndarray:
    """Exponent tuples ordered by total degree, then descending lexicographic order."""

    def compositions(total: int, parts: int) -> Iterator[tuple[int, ...]]:
        # first entry from high to low gives descending lexicographic order
        if parts == 1:
            yield (total,)
            return
        for first in range(total, -1, -1):
            for rest in compositions(total - first, parts - 1):
                yield (first, *rest)

    rows: list[tuple[int, ...]] = [(0,) * d]
    for total in range(1, degree + 1):
        if interactions:
            rows.extend(compositions(total, d))
        else:
            for i in range(d):
                e = [0] * d
                e[i] = total
                rows.append(tuple(e))
    return np.array(rows, dtype=np.int64).reshape(len(rows), d)


class Polynomial(Basis):
    """Polynomial basis of bounded total degree in the (scaled) inputs.

    Parameters
    ----------
    inputs : sequence of Input
        Declared inputs; tags must be unique.
    degree : int
        Maximum total degree, ``>= 1``.
    interactions : bool, default True
        If True, every multi-index of total degree ``<= degree``; if False only the
        constant and pure powers of single inputs.
    family : {"legendre", "chebyshev", "monomial"}, default "legendre"
        One-dimensional polynomials whose products form the terms.
    scale : bool, default True
        Map each input affinely from ``[lo, hi]`` to ``[-1, 1]`` before evaluation.
        ``scale=False`` (raw units) is only allowed with ``family="monomial"``.

    Raises
    ------
    ValueError
        On a bad degree, family, flag, duplicate tag, or ``scale=False`` with an
        orthogonal family.

    Notes
    -----
    **Scaling.** With ``scale=True`` each input is replaced by

    .. math:: u_i = \\frac{2 x_i - lo_i - hi_i}{hi_i - lo_i},

    evaluated as :math:`((x_i - lo_i) - (hi_i - x_i)) / (hi_i - lo_i)` so that the range
    ends map to exactly :math:`\\pm 1`. Readings outside the range give :math:`|u_i| > 1`
    and are evaluated by the same formulas (extrapolation).

    **One-dimensional families**, evaluated for :math:`k = 0, \\dots,` ``degree`` by their
    three-term recurrences, starting from :math:`p_0 = 1`, :math:`p_1 = u`:

    - Legendre: :math:`(k + 1) P_{k+1}(u) = (2k + 1)\\, u\\, P_k(u) - k\\, P_{k-1}(u)`,
      orthogonal on :math:`[-1, 1]` with
      :math:`\\int_{-1}^{1} P_j P_k \\, du = \\frac{2}{2k+1} \\delta_{jk}`;
    - Chebyshev (first kind): :math:`T_{k+1}(u) = 2 u\\, T_k(u) - T_{k-1}(u)`, with
      :math:`T_k(\\cos\\theta) = \\cos k\\theta`, so :math:`|T_k| \\le 1` on the interval;
    - monomial: :math:`u^{k+1} = u \\cdot u^k`.

    **Terms.** A term is a multi-index :math:`e \\in \\mathbb{N}^d` with value
    :math:`\\phi_e(x) = \\prod_i p_{e_i}(u_i)`. With interactions there are

    .. math:: p = \\binom{d + \\mathrm{degree}}{\\mathrm{degree}}

    terms (all :math:`e` with :math:`\\sum_i e_i \\le` ``degree``, counted by stars and
    bars); without interactions :math:`p = 1 + d \\cdot \\mathrm{degree}`.
    Terms are ordered by total degree, then by the exponent tuple in input order,
    larger exponents of earlier inputs first (descending lexicographic order), so
    degree 1 gives ``1, x_1, ..., x_d`` and degree 2 continues
    ``x_1^2, x_1 x_2, ..., x_2^2, ...``.

    **Names.** ``"1"`` for the constant; a factor of degree 1 is the tag; a factor of
    degree :math:`k \\ge 2` is ``"P<k>(tag)"``, ``"T<k>(tag)"`` or ``"tag^<k>"`` by
    family; factors are joined with ``"*"`` in input order.
    """

    kind = "polynomial"

    def __init__(
        self,
        inputs: Sequence[Input],
        degree: int,
        *,
        interactions: bool = True,
        family: str = "legendre",
        scale: bool = True,
    ) -> None:
        super().__init__(inputs)
        if isinstance(degree, bool) or not isinstance(degree, Integral) or degree < 1:
            raise ValueError(f"degree must be an int >= 1, got {degree!r}")
        if not isinstance(family, str) or family not in FAMILIES:
            raise ValueError(f"family must be one of {FAMILIES}, got {family!r}")
        if not isinstance(interactions, bool | np.bool_):
            raise ValueError(f"interactions must be a bool, got {interactions!r}")
        if not isinstance(scale, bool | np.bool_):
            raise ValueError(f"scale must be a bool, got {scale!r}")
        if not scale and family != "monomial":
            raise ValueError(
                f"scale=False is only allowed for family 'monomial', got family={family!r}"
            )
        self.degree: int = int(degree)
        self.interactions: bool = bool(interactions)
        self.family: str = family
        self.scale: bool = bool(scale)

        exps = _graded_exponents(self.n_inputs, self.degree, self.interactions)
        self._set_terms(exps, [self._term_name(e) for e in exps])

        # gather plan: for input i, the terms where it appears and with which degree
        self._plan: tuple[tuple[int, np.ndarray, np.ndarray], ...] = tuple(
            (i, np.flatnonzero(exps[:, i]), exps[exps[:, i] > 0, i])
            for i in range(self.n_inputs)
        )
        self._width = _readonly(self._hi - self._lo)

    def _term_name(self, e: np.ndarray) -> str:
        prefix = _NAME_PREFIX[self.family]
        factors = []
        for tag, k in zip(self.tags, e.tolist(), strict=True):
            if k == 0:
                continue
            if k == 1:
                factors.append(tag)
            elif prefix is None:
                factors.append(f"{tag}^{k}")
            else:
                factors.append(f"{prefix}{k}({tag})")
        return "*".join(factors) if factors else "1"

    def _tables(self, U: np.ndarray) -> np.ndarray:
        """1-D family values, shape (degree + 1, k, d): ``tab[n] = p_n(U)``."""
        tab = np.empty((self.degree + 1, *U.shape), dtype=np.float64)
        tab[0] = 1.0
        tab[1] = U
        fam = self.family
        for n in range(1, self.degree):
            if fam == "legendre":
                tab[n + 1] = ((2 * n + 1) * U * tab[n] - n * tab[n - 1]) / (n + 1)
            elif fam == "chebyshev":
                tab[n + 1] = 2.0 * U * tab[n] - tab[n - 1]
            else:
                tab[n + 1] = U * tab[n]
        return tab

    def _evaluate(self, X: np.ndarray) -> np.ndarray:
        if self.degree == 1 and self.scale and _scaled_row is not None:
            # one C pass instead of four array temporaries; the same operations (same bits)
            out = np.empty((X.shape[0], self.n_features), dtype=np.float64)
            _scaled_rows(out, np.ascontiguousarray(X, dtype=np.float64), self._lo, self._hi,
                         self._width)
            return out
        U = ((X - self._lo) - (self._hi - X)) / self._width if self.scale else X
        if self.degree == 1:
            # every family has p_1(u) = u and the terms are 1, u_1, ..., u_d in order
            out = np.empty((X.shape[0], self.n_features), dtype=np.float64)
            out[:, 0] = 1.0
            out[:, 1:] = U
            return out
        tab = self._tables(U)
        out = np.ones((X.shape[0], self.n_features), dtype=np.float64)
        for i, cols, powers in self._plan:
            out[:, cols] *= tab[powers, :, i].T
        return out

    def row_terms(self, x: list) -> np.ndarray:
        if self.degree != 1:
            return super().row_terms(x)
        if not self.scale:
            return np.array([[1.0, *x]], dtype=np.float64)
        if _scaled_row is not None:
            out = np.empty((1, self.n_features), dtype=np.float64)
            _scaled_row(out, x, self._lo, self._hi, self._width)
            return out
        lim = self.__dict__.get("_row_scale")
        if lim is None:
            lim = self.__dict__["_row_scale"] = tuple(zip(
                self._lo.tolist(), self._hi.tolist(), self._width.tolist(), strict=True))
        # _evaluate's ((X - lo) - (hi - X)) / width, elementwise
        return np.array([[1.0, *[((v - lo) - (hi - v)) / w
                                 for v, (lo, hi, w) in zip(x, lim, strict=True)]]],
                        dtype=np.float64)

    def _jacobian(self, x: np.ndarray) -> np.ndarray:
        """Product rule over the factors; 1-D derivatives by their recurrences.

        Legendre :math:`P'_{n+1} = P'_{n-1} + (2n + 1) P_n`, Chebyshev
        :math:`T'_{n+1} = 2 T_n + 2 u T'_n - T'_{n-1}`, monomial :math:`(u^{n+1})' =
        (n + 1) u^n`; times :math:`du/dx = 2 / (hi - lo)` when scaled.
        """
        if self.scale:
            u = ((x - self._lo) - (self._hi - x)) / self._width
            du = 2.0 / self._width
        else:
            u, du = x, np.ones_like(x)
        tab = self._tables(u.reshape(1, -1))[:, 0, :]          # (degree + 1, d)
        der = np.zeros_like(tab)
        if self.degree >= 1:
            der[1] = 1.0
        for n in range(1, self.degree):
            if self.family == "legendre":
                der[n + 1] = der[n - 1] + (2 * n + 1) * tab[n]
            elif self.family == "chebyshev":
                der[n + 1] = 2.0 * tab[n] + 2.0 * u * der[n] - der[n - 1]
            else:
                der[n + 1] = (n + 1) * tab[n]
        exps = self.exponents
        d = self.n_inputs
        cols = np.arange(d)
        factors = tab[exps, cols]                                # (p, d): p_{e_i}(u_i)
        out = np.empty((self.n_features, d), dtype=np.float64)
        for i in range(d):
            others = np.prod(np.delete(factors, i, axis=1), axis=1)
            out[:, i] = der[exps[:, i], i] * others * du[i]
        return out

    def _spec(self) -> dict[str, Any]:
        return {
            "degree": self.degree,
            "interactions": self.interactions,
            "family": self.family,
            "scale": self.scale,
        }


_KINDS: dict[str, type[Basis]] = {"identity": Identity, "polynomial": Polynomial}


def from_dict(d: Mapping[str, Any]) -> Basis:
    """Rebuild a basis from :meth:`Basis.to_dict` output.

    Parameters
    ----------
    d : mapping
        Must hold ``kind``, ``schema_version`` (currently 1) and ``inputs``; a
        polynomial also needs ``degree`` and may hold ``interactions``, ``family`` and
        ``scale`` (constructor defaults otherwise).

    Returns
    -------
    Basis
        A basis equal to the one that produced ``d``.

    Raises
    ------
    ValueError
        On an unknown kind or schema version, missing keys or invalid values.

    Notes
    -----
    Only plain data (str, int, float, bool, lists, dicts) is read, so the description
    can travel through JSON or msgpack.
    """
    if not isinstance(d, Mapping):
        raise ValueError(f"basis description must be a mapping, got {d!r}")
    version = d.get("schema_version")
    if version != SCHEMA_VERSION:
        raise ValueError(f"unsupported basis schema_version {version!r}, expected {SCHEMA_VERSION}")
    kind = d.get("kind")
    if kind not in _KINDS:
        raise ValueError(f"unknown basis kind {kind!r}, expected one of {sorted(_KINDS)}")
    raw_inputs = d.get("inputs")
    if isinstance(raw_inputs, str | bytes | Mapping) or not isinstance(raw_inputs, Sequence):
        raise ValueError(f"basis 'inputs' must be a list of input descriptions, got {raw_inputs!r}")
    inputs = [Input.from_dict(item) for item in raw_inputs]
    if kind == "identity":
        return Identity(inputs)
    if "degree" not in d:
        raise ValueError(f"polynomial basis description lacks 'degree': {d!r}")
    opts = {k: d[k] for k in ("interactions", "family", "scale") if k in d}
    return Polynomial(inputs, d["degree"], **opts)
