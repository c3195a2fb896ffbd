"""Per-sample kernels of the square-root information form, in numpy and plain Python.

This module is the reference implementation of :mod:`recursive._kernel`, the optional C
extension with the identical API, and the fallback when that extension is not built::

    try:
        from recursive import _kernel as kernel
    except ImportError:
        from recursive import _givens as kernel

The posterior is an upper-triangular ``R`` with ``R^T R = Lambda`` (the precision) and a
vector ``z`` with ``R^T z = Lambda m`` (``m`` the mean). Every function takes arrays that
export a C-contiguous float64 buffer (numpy arrays, ``array.array("d")``, ...), changes the
output arrays in place and allocates nothing the caller sees. Only the upper triangle of
``R`` is read or written. Argument errors raise ``TypeError`` (not a float64 buffer, not a
number) or ``ValueError`` (dimensions, shapes, layout, read-only output, outputs sharing
memory with another argument, ``n > MAX_N``, values out of range). Both implementations
perform the same rotations, reflections and substitutions in the same order (the C code
only groups some sums differently), so they agree to rounding.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["MAX_N", "predict", "random_walk", "rank_ratio", "solve_upper", "stabilize",
           "stabilized_rows", "stabilized_rows_many", "term_drift", "update", "whiten_norm",
           "scaled_row", "outside"]

#: Largest ``n`` accepted (the C kernel's stack workspaces are sized for it).
MAX_N = 1024

_FLOAT64_FORMATS = ("d", "@d", "=d", "<d" if np.little_endian else ">d")


def _view(obj, name: str, ndim: int, want, writable: bool) -> np.ndarray:
    """View ``obj`` as an ndarray after the checks the C kernel makes, in its order.

    ``want`` maps the buffer's shape to the shape required.
    """
    try:
        mv = memoryview(obj)
    except TypeError:
        raise TypeError(f"{name} must be a float64 array, got {type(obj).__name__}") from None
    if mv.format not in _FLOAT64_FORMATS or mv.itemsize != 8:
        raise TypeError(f"{name} must be a float64 array (buffer format 'd'), "
                        f"got format {mv.format!r}")
    if mv.ndim != ndim:
        raise ValueError(f"{name} must have {ndim} dimension(s), got {mv.ndim}")
    shape = want(mv.shape)
    if mv.shape != shape:
        raise ValueError(f"{name} must have shape {shape}, got {mv.shape}")
    if not mv.c_contiguous:
        raise ValueError(f"{name} must be C-contiguous")
    if writable and mv.readonly:
        raise ValueError(f"{name} must be writable, got a read-only buffer")
    return np.asarray(mv)


def _array(obj, name: str, ndim: int, n: int | None, writable: bool) -> np.ndarray:
    """A vector or square matrix of side ``n`` (None: any, taken from the first axis)."""
    return _view(obj, name, ndim, lambda sh: (sh[0] if n is None else n,) * ndim, writable)


def _matrix(obj, name: str, shape: tuple, writable: bool) -> np.ndarray:
    """A 2-D array of ``shape`` (None: any length on that axis)."""
    return _view(obj, name, 2, lambda sh: tuple(sh[i] if s is None else s
                                                 for i, s in enumerate(shape)), writable)


def _check_n(n: int) -> None:
    if n > MAX_N:
        raise ValueError(f"n must be at most {MAX_N}, got {n}")


def _check_disjoint(outputs: dict, inputs: dict) -> None:
    """Refuse an output that overlaps another argument: it would be read after writing."""
    items = list(outputs.items())
    for i, (name, a) in enumerate(items):
        for other, b in items[i + 1:] + list(inputs.items()):
            if np.may_share_memory(a, b):
                raise ValueError(f"{name} and {other} must not share memory")


def _real(value, name: str) -> float:
    # The same values as the C API's PyFloat_AsDouble: numbers, not strings that parse.
    t = type(value)
    if not (hasattr(t, "__float__") or hasattr(t, "__index__")):
        raise TypeError(f"{name} must be a real number, got {value!r}")
    return float(value)


def _rotate_in(R: np.ndarray, z: np.ndarray, w: np.ndarray, y: float, i0: int) -> float:
    """Rotate the row ``[w, y]`` (zero before column ``i0``) into ``[R | z]``; return ``y``."""
    n = z.shape[0]
    for i in range(i0, n):
        a, b = float(R[i, i]), float(w[i])
        if a == 0.0 and b == 0.0:
            continue
        r = math.hypot(a, b)
        c, s = a / r, b / r
        R[i, i] = r
        w[i] = 0.0
        t = R[i, i + 1:].copy()
        R[i, i + 1:] = c * t + s * w[i + 1:]
        w[i + 1:] = c * w[i + 1:] - s * t
        zi = float(z[i])
        z[i] = c * zi + s * y
        y = c * y - s * zi
    return y


def update(R, z, phi, y, /) -> float:
    """Rotate the observation row ``[phi^T, y]`` into ``[R | z]`` in place.

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular square-root information factor; overwritten.
    z : float64 buffer, shape (n,)
        Square-root information vector; overwritten.
    phi : float64 buffer, shape (n,)
        Regressor; used as workspace and left as zeros.
    y : float
        Target value.

    Returns
    -------
    float
        The signed residual ``e``.

    Notes
    -----
    Afterwards ``[R z; 0 e] = Q^T [R0 z0; phi^T y]`` with ``Q`` a product of Givens
    rotations, so

    .. math::

        R^T R = R_0^T R_0 + \\phi \\phi^T, \\qquad R^T z = R_0^T z_0 + \\phi y .

    In column ``i`` the rotation is ``c = R_ii / r``, ``s = phi_i / r``,
    ``r = hypot(R_ii, phi_i)`` (skipped when both are 0): it zeroes ``phi_i`` and makes the
    new diagonal ``r >= 0`` whatever the sign of the old one.

    Since ``det Q = 1``, comparing determinants of the two sides gives
    ``prod(R0_ii) (y - phi^T m) = prod(R_ii) e``, and the matrix determinant lemma gives
    ``prod(R_ii)^2 / prod(R0_ii)^2 = 1 + phi^T V phi`` (``V = (R0^T R0)^{-1}``). Hence for
    ``R0`` with a positive diagonal

    .. math::

        e = \\frac{y - \\phi^T m}{\\sqrt{1 + \\phi^T V \\phi}},

    the standardized one-step-ahead prediction error, with its sign.
    """
    y = _real(y, "y")
    zv = _array(z, "z", 1, None, True)
    n = zv.shape[0]
    _check_n(n)
    Rv = _array(R, "R", 2, n, True)
    pv = _array(phi, "phi", 1, n, True)
    _check_disjoint({"z": zv, "R": Rv, "phi": pv}, {})
    return float(_rotate_in(Rv, zv, pv, y, 0))


def stabilize(R, z, r0, z0, delta, /) -> None:
    """Flatten ``[R | z]`` toward the prior in place (stabilized forgetting).

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular factor; overwritten.
    z : float64 buffer, shape (n,)
        Information vector; overwritten.
    r0, z0 : float64 buffers, shape (n,)
        Prior square-root precisions (per weight) and prior information vector.
    delta : float
        Weight kept on the current information, ``0 <= delta <= 1``.

    Notes
    -----
    ``[R | z]`` becomes the triangular factor of the stacked matrix

    .. math::

        \\begin{bmatrix} \\sqrt{\\delta} R & \\sqrt{\\delta} z \\\\
        \\sqrt{1-\\delta}\\, \\mathrm{diag}(r_0) & \\sqrt{1-\\delta}\\, z_0 \\end{bmatrix},

    so ``R^T R = delta R^T R + (1-delta) diag(r0^2)`` and
    ``R^T z = delta R^T z + (1-delta) r0 * z0``. After the scaling, prior row ``i`` is zero
    before column ``i`` and is rotated in from there as in :func:`update`. A row with
    ``r0_i = 0`` carries no information and is skipped (its ``z0_i`` could only add to the
    residual, which is not kept).
    """
    d = _real(delta, "delta")
    if not 0.0 <= d <= 1.0:
        raise ValueError(f"delta must be in [0, 1], got {delta!r}")
    zv = _array(z, "z", 1, None, True)
    n = zv.shape[0]
    _check_n(n)
    Rv = _array(R, "R", 2, n, True)
    r0v = _array(r0, "r0", 1, n, False)
    z0v = _array(z0, "z0", 1, n, False)
    _check_disjoint({"z": zv, "R": Rv}, {"r0": r0v, "z0": z0v})
    sd, sc = math.sqrt(d), math.sqrt(1.0 - d)
    if sd != 1.0:
        iu = np.triu_indices(n)
        Rv[iu] *= sd
        zv *= sd
    w = np.zeros(n)
    for i in range(n):
        di = sc * float(r0v[i])
        if di == 0.0:
            continue
        w[i:] = 0.0
        w[i] = di
        _rotate_in(Rv, zv, w, sc * float(z0v[i]), i)


def random_walk(R, z, c, /) -> None:
    """Time update for weights that follow a random walk, in place.

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular factor; overwritten. May be singular.
    z : float64 buffer, shape (n,)
        Information vector; overwritten.
    c : float
        Covariance increment per weight (``w <- w + noise``, ``cov(noise) = c I``),
        positive and finite.

    Notes
    -----
    The new information matrix is

    .. math::

        \\Lambda' = \\Lambda (I + c \\Lambda)^{-1} = R^T (I + c R R^T)^{-1} R
        = (\\Lambda^{-1} + c I)^{-1},

    the middle form by the push-through identity, the last only when ``Lambda`` is
    invertible; the new information vector is ``(I + c Lambda)^{-1} eta``, which leaves the
    mean unchanged. With ``U`` lower triangular and ``U^T U = I + c R R^T``,
    ``R' = U^{-T} R`` is upper triangular and ``R'^T R' = Lambda'``; ``z' = U^{-T} z``.

    ``U`` is found without forming ``R R^T``: Householder reflections triangularize the
    stacked ``[I; sqrt(c) R^T]`` from the last column to the first (a QL factorization).
    When column ``k`` is reached the top row ``k`` is still ``e_k`` and every bottom row
    lives in columns ``0..k``, so the reflection mixes that top row with the bottom rows
    ``k..n-1`` only. The diagonal of ``U`` is at least 1, so the back substitution
    ``U^T R' = R`` is always defined and a singular ``R`` (weights not yet identified) is
    fine. ``R'_ii = R_ii / U_ii`` keeps the sign of ``R``'s diagonal; rows with a negative
    diagonal are negated at the end (an orthogonal change).
    """
    cv = _real(c, "c")
    if not (cv > 0.0 and math.isfinite(cv)):
        raise ValueError(f"c must be positive and finite, got {c!r}")
    zv = _array(z, "z", 1, None, True)
    n = zv.shape[0]
    _check_n(n)
    Rv = _array(R, "R", 2, n, True)
    _check_disjoint({"z": zv, "R": Rv}, {})
    Ru = np.triu(Rv)  # only the upper triangle is read
    T = np.eye(n)
    B = math.sqrt(cv) * Ru.T.copy()  # bottom row i: column i of R
    for k in range(n - 1, -1, -1):
        x = B[k:, k]
        m = max(1.0, float(np.max(np.abs(x))))
        scale = 1.0 / m if m > 1e150 else 1.0  # the top entry is >= 1: guard overflow only
        v = scale * x
        sigma = float(v @ v)
        if sigma == 0.0:
            continue
        a = scale * T[k, k]
        beta = math.sqrt(a * a + sigma)
        v0 = -sigma / (a + beta)  # a - beta without cancellation
        tau = -1.0 / (beta * v0)
        T[k, k] = beta / scale
        s = v @ B[k:, :k]  # the top row is still e_k: nothing from it below column k
        T[k, :k] = -tau * v0 * s
        B[k:, :k] -= np.outer(tau * v, s)
        B[k:, k] = 0.0
    X = np.zeros((n, n))
    zn = np.empty(n)
    for i in range(n - 1, -1, -1):
        u = T[i + 1:, i]
        X[i, i:] = (Ru[i, i:] - u @ X[i + 1:, i:]) / T[i, i]
        zn[i] = (float(zv[i]) - float(u @ zn[i + 1:])) / T[i, i]
    for i in range(n):
        sign = -1.0 if X[i, i] < 0.0 else 1.0
        Rv[i, i:] = sign * X[i, i:]
        zv[i] = sign * zn[i]


def _drift_one(R, z, s_row, j: int, c: float) -> None:
    """Information form of ``V <- V + c e_j e_j^T`` (see :func:`term_drift`)."""
    col = np.flatnonzero(R[:j + 1, j])
    if col.size == 0:
        return  # nothing is known about w_j: nothing to forget
    p = int(col[-1])
    # E_i = 1 + c sum_{k >= i} R_kj^2, or that over c when c > 1 (so that c = inf works)
    rho, e = (c, 1.0) if c <= 1.0 else (1.0, 1.0 / c)
    s_row[:] = 0.0
    s_z = 0.0
    for i in range(p, -1, -1):
        rij = float(R[i, j])
        if rij == 0.0:
            continue  # f = 1, g = 0: the row is unchanged
        e_new = e + rho * rij * rij
        y = R[i, i:] - rij * s_row[i:]
        yz = float(z[i]) - rij * s_z
        f = math.sqrt(e / e_new)
        g = rho * rij / e_new
        s_row[i:] += g * y
        s_z += g * yz
        R[i, i:] = f * y
        z[i] = f * yz
        e = e_new
    for i in range(p + 1):
        if R[i, i] < 0.0:
            R[i, i:] = -R[i, i:]
            z[i] = -z[i]


def term_drift(R, z, q, s, /) -> None:
    """Square-root information time update for weights with independent random walks.

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular factor; overwritten.
    z : float64 buffer, shape (n,)
        Information vector; overwritten.
    q : float64 buffer, shape (n,)
        Non-negative finite rates, one per weight (0: that weight does not move).
    s : float
        Non-negative finite factor: weight ``j`` gets the variance ``c_j = s * q_j``.

    Notes
    -----
    The covariance becomes ``V + C``, ``C = diag(c)``; in information form
    ``Lambda' = Lambda (I + C Lambda)^{-1}`` and ``eta' = (I + Lambda C)^{-1} eta``, so
    the mean is unchanged and a singular ``R`` is fine. ``C`` is a sum of the rank-one
    terms ``c_j e_j e_j^T``, and increments of ``V`` add up, so the weights with
    ``c_j > 0`` are done one at a time, each exactly.

    For one weight, ``Lambda' = R^T (I + a a^T)^{-1} R`` with ``a = sqrt(c) r``,
    ``r = R e_j`` (zero below row ``j``). As in :func:`random_walk`, ``R' = U^{-T} R`` with
    ``U`` lower triangular, ``U^T U = I + a a^T``; here ``U`` is known in closed form
    (the Cholesky factor of an identity plus a rank-one term, in reverse order): with
    ``T_i = 1 + c sum_{k >= i} r_k^2``,
    ``U_ii = sqrt(T_i / T_{i+1})`` and ``U_ki = c r_k r_i / sqrt(T_i T_{i+1})`` for
    ``k < i``. The back substitution ``U^T R' = R`` then needs one running row
    ``S = sum_{k > i} c r_k R'_k / sqrt(T_k T_{k+1})``: from the last row with
    ``r_i != 0`` up,

    .. math::

        Y_i = R_i - r_i S, \\quad R'_i = \\sqrt{T_{i+1} / T_i}\\, Y_i, \\quad
        S \\leftarrow S + (c\\, r_i / T_i)\\, Y_i ,

    and likewise for ``z``: about ``4 j n`` flops, a scaling of row 0 for ``j = 0`` (a
    constant first in the basis). ``U^{-T}`` is upper triangular with a positive
    diagonal, so zero rows of ``R`` stay zero, ``R'_ii`` has the sign of ``R_ii`` (rows
    with a negative one are negated at the end) and rows with ``r_i = 0`` are unchanged.
    For ``c > 1`` the ``T_i`` are divided by ``c``, which changes neither ratio and lets
    a ``c`` that overflowed to infinity give its limit: everything known about ``w_j`` is
    forgotten (row ``p``, the last with ``r_p != 0``, becomes zero).
    """
    sv = _real(s, "s")
    if not (sv >= 0.0 and math.isfinite(sv)):
        raise ValueError(f"s must be non-negative and finite, got {s!r}")
    zv = _array(z, "z", 1, None, True)
    n = zv.shape[0]
    _check_n(n)
    Rv = _array(R, "R", 2, n, True)
    qv = _array(q, "q", 1, n, False)
    _check_disjoint({"z": zv, "R": Rv}, {"q": qv})
    for j in range(n):
        qj = float(qv[j])
        if not (qj >= 0.0 and math.isfinite(qj)):
            raise ValueError(f"q must be non-negative and finite, got q[{j}] = {qj!r}")
    s_row = np.zeros(n)
    for j in range(n):
        c = sv * float(qv[j])
        if c != 0.0:
            _drift_one(Rv, zv, s_row, j, c)


def stabilized_rows(out, M, kappa, c0, dc, P, dt, half_life, /) -> None:
    """Per-row predictive mean and leverage under stabilized forgetting, for a batch.

    Parameters
    ----------
    out : float64 buffer, shape (3, k)
        Overwritten with the means, the leverages and the factors ``delta`` of the rows.
    M : float64 buffer, shape (n, n)
        ``W^T R^{-T}`` (see :class:`recursive.Stabilized`).
    kappa, c0, dc : float64 buffers, shape (n,)
        Eigenvalues of the pencil and the numerator terms ``c0`` and ``c - c0``.
    P : float64 buffer, shape (k, n)
        Regressors, one per row.
    dt : float64 buffer, shape (k,)
        Time since the last update of each row.
    half_life : float
        Positive and finite.

    Notes
    -----
    For row ``j``, with ``delta_j = 2**(-dt_j / half_life)``, ``g = M P_j`` and
    ``q_i = kappa_i + (1 - kappa_i) delta_j``:

    .. math::

        m_j = \\sum_i g_i (c0_i + dc_i \\delta_j) / q_i, \\qquad
        \\ell_j = \\sum_i g_i^2 / q_i .

    A term with ``g_i = 0`` adds nothing, even where ``q_i = 0``; otherwise a ``q_i`` of 0
    (everything forgotten in a direction without prior information) gives an infinite
    leverage.
    """
    h = _real(half_life, "half_life")
    if not (h > 0.0 and math.isfinite(h)):
        raise ValueError(f"half_life must be positive and finite, got {half_life!r}")
    o = _matrix(out, "out", (3, None), True)
    k = o.shape[1]
    kv = _array(kappa, "kappa", 1, None, False)
    n = kv.shape[0]
    _check_n(n)
    Mv = _matrix(M, "M", (n, n), False)
    c0v = _array(c0, "c0", 1, n, False)
    dcv = _array(dc, "dc", 1, n, False)
    Pv = _matrix(P, "P", (k, n), False)
    dtv = _array(dt, "dt", 1, k, False)
    _check_disjoint({"out": o}, {"kappa": kv, "M": Mv, "c0": c0v, "dc": dcv, "P": Pv,
                                 "dt": dtv})
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        d = np.exp2(-dtv / h)
        g = Mv @ Pv.T
        gi = np.where(g == 0.0, 0.0, g / (kv[:, None] + (1.0 - kv)[:, None] * d))
        o[1] = np.einsum("ij,ij->j", g, gi)
        o[0] = np.einsum("ij,ij->j", gi, c0v[:, None] + dcv[:, None] * d)
        o[2] = d


def predict(R, z, phi, /) -> tuple[float, float]:
    """Predictive mean and leverage of the regressor ``phi``; nothing is modified.

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular factor.
    z : float64 buffer, shape (n,)
        Information vector.
    phi : float64 buffer, shape (n,)
        Regressor.

    Returns
    -------
    mean, lev : float
        ``phi^T m`` and ``phi^T V phi``; ``(nan, nan)`` if a diagonal entry of ``R`` is
        exactly 0 (the weights are not identified).

    Notes
    -----
    With ``u = R^{-T} phi`` (forward substitution),
    ``phi^T m = phi^T R^{-1} z = u^T z`` and
    ``phi^T V phi = phi^T R^{-1} R^{-T} phi = u^T u``.
    """
    zv = _array(z, "z", 1, None, False)
    n = zv.shape[0]
    _check_n(n)
    Rv = _array(R, "R", 2, n, False)
    pv = _array(phi, "phi", 1, n, False)
    u = pv.copy()
    mean = lev = 0.0
    for i in range(n):
        d = float(Rv[i, i])
        if d == 0.0:
            return math.nan, math.nan
        ui = float(u[i]) / d
        mean += ui * float(zv[i])
        lev += ui * ui
        u[i + 1:] -= Rv[i, i + 1:] * ui
    return mean, lev


def solve_upper(R, b, /) -> None:
    """Overwrite ``b`` with ``R^{-1} b`` (back substitution).

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular matrix.
    b : float64 buffer, shape (n,)
        Right-hand side; overwritten with the solution.

    Raises
    ------
    ZeroDivisionError
        If a diagonal entry of ``R`` is exactly 0 (``b`` is then unchanged).

    Notes
    -----
    ``x_i = (b_i - sum_{j > i} R_ij x_j) / R_ii`` for ``i = n-1, ..., 0``.
    """
    bv = _array(b, "b", 1, None, True)
    n = bv.shape[0]
    _check_n(n)
    Rv = _array(R, "R", 2, n, False)
    _check_disjoint({"b": bv}, {"R": Rv})
    zero = np.flatnonzero(np.diagonal(Rv) == 0.0)
    if zero.size:
        i = int(zero[0])
        raise ZeroDivisionError(f"R is singular: R[{i}, {i}] == 0")
    for i in range(n - 1, -1, -1):
        bv[i] = (float(bv[i]) - float(Rv[i, i + 1:] @ bv[i + 1:])) / float(Rv[i, i])


def rank_ratio(R, /) -> float:
    """Scale-invariant rank measure of an upper-triangular ``R``.

    Parameters
    ----------
    R : float64 buffer, shape (n, n)
        Upper-triangular matrix (the strict lower triangle is ignored).

    Returns
    -------
    float
        ``min_i |R_ii| / ||R[:i+1, i]||`` in ``[0, 1]``, with ``0/0`` counted as 0; 1.0
        for ``n = 0`` and nan if the triangle holds a nan.

    Notes
    -----
    ``|R_ii|`` is the norm of the part of column ``i`` of ``A`` (any ``A`` with
    ``A^T A = R^T R``) orthogonal to the columns before it, and ``||R[:i+1, i]||`` is the
    norm of the whole column, so the ratio is the sine of the angle between column ``i`` and
    the span of the others before it. It does not change when a column is rescaled, so a
    regressor in large units is not mistaken for a missing one. Each column is divided by
    its largest entry before squaring so that the norm cannot overflow.
    """
    Rv = _array(R, "R", 2, None, False)
    n = Rv.shape[0]
    _check_n(n)
    best = 1.0
    for i in range(n):
        col = np.abs(Rv[:i + 1, i])
        big = float(np.max(col))
        if math.isnan(big):
            return math.nan
        if big == 0.0:
            ratio = 0.0
        else:
            s = col / big
            ratio = float(col[i]) / big / math.sqrt(float(s @ s))
        if math.isnan(ratio):
            return math.nan
        best = min(best, ratio)
    return best


def whiten_norm(x, mean, M, /) -> float:
    """Length of ``x - mean`` whitened by ``M``: a Mahalanobis distance of one row.

    Parameters
    ----------
    x : list or tuple of n numbers
        The row.
    mean : float64 buffer, shape (n,)
        Centre.
    M : float64 buffer, shape (n, n)
        Whitening matrix, e.g. the inverse of a lower Cholesky factor ``L`` of the
        covariance (then the result is ``sqrt((x - mean)^T (L L^T)^{-1} (x - mean))``).

    Returns
    -------
    float
        ``sqrt(sum_i y_i^2)`` with ``y_i = sum_j M_ij (x_j - mean_j)``.

    Notes
    -----
    Every sum runs in index order over all of ``j`` (the zeros of a triangular ``M``
    included: a zero times an infinite difference is nan, as in the array expression
    ``Y = D[:, :1] * M[:, 0]; Y = Y + D[:, j:j + 1] * M[:, j]; ...``), each product and sum
    rounded on its own, so the value has the same bits as that elementwise array path.
    """
    mv = _array(mean, "mean", 1, None, False)
    n = mv.shape[0]
    _check_n(n)
    Mv = _array(M, "M", 2, n, False)
    d = [v - m for v, m in zip(_row(x, n), mv.tolist(), strict=True)]
    acc = 0.0
    for i, row in enumerate(Mv.tolist()):
        y = d[0] * row[0]
        for j in range(1, n):
            y = y + d[j] * row[j]
        acc = y * y if i == 0 else acc + y * y
    return math.sqrt(acc)


def scaled_row(out, x, lo, hi, width, /) -> None:
    """Terms of an affine basis of one row on inputs scaled to [-1, 1], written to ``out``.

    Parameters
    ----------
    out : writable float64 buffer, shape (1, n + 1)
        Receives ``1`` and then ``u_j = ((x_j - lo_j) - (hi_j - x_j)) / width_j``.
    x : list or tuple of n numbers
        The row.
    lo, hi, width : float64 buffers, shape (n,)
        Instrument ranges and their widths ``hi - lo``.

    Notes
    -----
    ``u = (2 x - lo - hi) / (hi - lo)`` maps ``[lo, hi]`` onto ``[-1, 1]``; it is computed
    in the grouping above, each operation rounded on its own, the bits of the array path.
    """
    lv = _array(lo, "lo", 1, None, False)
    n = lv.shape[0]
    _check_n(n)
    hv = _array(hi, "hi", 1, n, False)
    wv = _array(width, "width", 1, n, False)
    ov = _matrix(out, "out", (1, n + 1), True)
    d = _row(x, n)
    ov[0, 0] = 1.0
    for j, (v, a, b, w) in enumerate(zip(d, lv.tolist(), hv.tolist(), wv.tolist(),
                                         strict=True)):
        ov[0, 1 + j] = ((v - a) - (b - v)) / w


def whiten_norms(out, X, mean, M, /) -> None:
    """:func:`whiten_norm` of every row of ``X`` (float64 buffer, shape (k, n)) into ``out``.

    Parameters
    ----------
    out : writable float64 buffer, shape (k,)
        Receives the distances.
    X : float64 buffer, shape (k, n)
        The rows.
    mean, M : float64 buffers, shapes (n,) and (n, n)
        As in :func:`whiten_norm`.

    Notes
    -----
    The elementwise array expression of :func:`whiten_norm` over all rows at once: each
    row's value is computed from that row alone, with the same bits as row by row.
    """
    mv = _array(mean, "mean", 1, None, False)
    n = mv.shape[0]
    _check_n(n)
    Mv = _array(M, "M", 2, n, False)
    Xv = _matrix(X, "X", (None, n), False)
    ov = _view(out, "out", 1, lambda sh: (Xv.shape[0],), True)
    _check_disjoint({"out": ov}, {"X": Xv, "mean": mv, "M": Mv})
    if n == 0:
        ov[:] = 0.0
        return
    D = Xv - mv
    Y = D[:, :1] * Mv[:, 0]
    for j in range(1, n):
        Y = Y + D[:, j:j + 1] * Mv[:, j]
    acc = Y[:, 0] * Y[:, 0]
    for i in range(1, n):
        acc = acc + Y[:, i] * Y[:, i]
    ov[:] = np.sqrt(acc)


def scaled_rows(out, X, lo, hi, width, /) -> None:
    """:func:`scaled_row` of every row of ``X`` (float64 buffer, shape (k, n)) into ``out``
    (writable float64 buffer, shape (k, n + 1)); the array expression, the same bits."""
    lv = _array(lo, "lo", 1, None, False)
    n = lv.shape[0]
    _check_n(n)
    hv = _array(hi, "hi", 1, n, False)
    wv = _array(width, "width", 1, n, False)
    Xv = _matrix(X, "X", (None, n), False)
    ov = _matrix(out, "out", (Xv.shape[0], n + 1), True)
    _check_disjoint({"out": ov}, {"X": Xv, "lo": lv, "hi": hv, "width": wv})
    ov[:, 0] = 1.0
    ov[:, 1:] = ((Xv - lv) - (hv - Xv)) / wv


def outside_rows(out, X, lo, hi, /) -> int:
    """Flag the rows of ``X`` (float64 buffer, shape (k, n)) with a value below ``lo`` or
    above ``hi`` (float64 buffers, shape (n,)): ``out`` (writable float64 buffer, shape
    (k,)) gets 1.0 for such a row and 0.0 otherwise (a nan is in range). Returns the number
    of rows flagged."""
    lv = _array(lo, "lo", 1, None, False)
    n = lv.shape[0]
    _check_n(n)
    hv = _array(hi, "hi", 1, n, False)
    Xv = _matrix(X, "X", (None, n), False)
    ov = _view(out, "out", 1, lambda sh: (Xv.shape[0],), True)
    _check_disjoint({"out": ov}, {"X": Xv, "lo": lv, "hi": hv})
    flags = ((Xv < lv) | (Xv > hv)).any(axis=1)
    ov[:] = flags
    return int(np.count_nonzero(flags))


def outside(x, lo, hi, /) -> bool:
    """True if a value of the row ``x`` (list or tuple of n numbers) is below ``lo`` or
    above ``hi`` (float64 buffers of shape (n,)); a nan is in range (it compares false)."""
    lv = _array(lo, "lo", 1, None, False)
    n = lv.shape[0]
    _check_n(n)
    hv = _array(hi, "hi", 1, n, False)
    d = _row(x, n)
    return any(v < a or v > b for v, a, b in zip(d, lv.tolist(), hv.tolist(), strict=True))


def _row(x, n: int) -> list:
    if not isinstance(x, list | tuple):
        raise TypeError(f"x must be a list or tuple of numbers, got {type(x).__name__}")
    if len(x) != n:
        raise ValueError(f"x must have {n} values, got {len(x)}")
    return [_real(v, "x") for v in x]


def stabilized_rows_many(out, M, kappa, c0, dc, half_life, P, dt, owner, /) -> None:
    """:func:`stabilized_rows` for the rows of several models of ``n`` terms at once.

    Parameters
    ----------
    out : float64 buffer, shape (3, k)
        Overwritten as by :func:`stabilized_rows`.
    M : float64 buffer, shape (G n, n)
        The models' ``W^T R^{-T}``, one below the other.
    kappa, c0, dc : float64 buffers, shape (G, n)
        Each model's pencil eigenvalues and numerator terms.
    half_life : float64 buffer, shape (G,)
        Each model's half-life, positive and finite.
    P : float64 buffer, shape (k, n)
        Regressors, one per row.
    dt : float64 buffer, shape (k,)
        Time since the owning model's last update, per row.
    owner : float64 buffer, shape (k,)
        The model of each row, an integer in ``0..G-1``.

    Notes
    -----
    Row ``j`` gets what :func:`stabilized_rows` gives it alone with model ``owner[j]``'s
    arguments; this twin calls that function for each row.
    """
    o = _matrix(out, "out", (3, None), True)
    k = o.shape[1]
    kv = _matrix(kappa, "kappa", (None, None), False)
    g_count, n = kv.shape
    _check_n(n)
    Mv = _matrix(M, "M", (g_count * n, n), False)
    c0v = _matrix(c0, "c0", (g_count, n), False)
    dcv = _matrix(dc, "dc", (g_count, n), False)
    hv = _array(half_life, "half_life", 1, g_count, False)
    Pv = _matrix(P, "P", (k, n), False)
    dtv = _array(dt, "dt", 1, k, False)
    ov = _array(owner, "owner", 1, k, False)
    _check_disjoint({"out": o}, {"kappa": kv, "M": Mv, "c0": c0v, "dc": dcv,
                                 "half_life": hv, "P": Pv, "dt": dtv, "owner": ov})
    if not np.all((ov >= 0) & (ov < g_count) & (ov == np.floor(ov))):
        raise ValueError(f"owner must hold integers in 0..{g_count - 1}")
    # row by row: a row's numbers then do not depend on the others (numpy's matrix
    # products round differently with the batch), as in the kernel
    for j, g in enumerate(ov.astype(int).tolist()):
        part = np.empty((3, 1))
        stabilized_rows(part, np.ascontiguousarray(Mv[g * n:(g + 1) * n]), kv[g].copy(),
                        c0v[g].copy(), dcv[g].copy(), np.ascontiguousarray(Pv[j:j + 1]),
                        dtv[j:j + 1].copy(), float(hv[g]))
        o[:, j] = part[:, 0]
