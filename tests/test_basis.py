"""Tests for recursive.basis against numpy.polynomial, scipy.special and scikit-learn."""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from numpy.polynomial import chebyshev as npcheb
from numpy.polynomial import legendre as npleg
from numpy.polynomial import polyutils
from scipy import special
from sklearn.preprocessing import PolynomialFeatures

from recursive.basis import FAMILIES, Basis, Identity, Input, Polynomial, from_dict

TI = Input("TI-104", 20.0, 180.0)
FI = Input("FI-201", 0.0, 50.0)
PI = Input("PI-330", -1.0, 3.5)


def _points(inp: Input, rng: np.random.Generator, n: int = 40) -> np.ndarray:
    """Range ends, interior points and points outside the range on both sides."""
    width = inp.hi - inp.lo
    inside = rng.uniform(inp.lo, inp.hi, n)
    outside = np.concatenate(
        [rng.uniform(inp.lo - width, inp.lo, 5), rng.uniform(inp.hi, inp.hi + width, 5)]
    )
    return np.concatenate([[inp.lo, inp.hi, 0.5 * (inp.lo + inp.hi)], inside, outside])


def _u(x: np.ndarray, inp: Input) -> np.ndarray:
    # reference for the affine map [lo, hi] -> [-1, 1]: numpy.polynomial.polyutils.mapdomain
    return polyutils.mapdomain(x, [inp.lo, inp.hi], [-1.0, 1.0])


# --------------------------------------------------------------------------- Input


def test_input_stores_floats_and_is_frozen():
    inp = Input("TI-104", 0, 200)
    assert inp.lo == 0.0 and isinstance(inp.lo, float)
    assert inp.hi == 200.0 and isinstance(inp.hi, float)
    assert inp == Input("TI-104", 0.0, 200.0)
    with pytest.raises(AttributeError):
        inp.lo = 1.0  # type: ignore[misc]


@pytest.mark.parametrize(
    ("tag", "lo", "hi", "bad"),
    [
        ("", 0.0, 1.0, "''"),
        ("TI 104", 0.0, 1.0, "'TI 104'"),
        ("TI-104\t", 0.0, 1.0, "'TI-104\\t'"),
        (104, 0.0, 1.0, "104"),
        ("TI-104", 1.0, 1.0, "lo=1.0, hi=1.0"),
        ("TI-104", 2.0, 1.0, "lo=2.0, hi=1.0"),
        ("TI-104", float("nan"), 1.0, "nan"),
        ("TI-104", 0.0, float("nan"), "nan"),
        ("TI-104", 0.0, float("inf"), "inf"),
        ("TI-104", -float("inf"), 0.0, "-inf"),
        ("TI-104", "0", 1.0, "'0'"),
        ("TI-104", 0.0, True, "True"),
    ],
)
def test_input_rejects_bad_values(tag, lo, hi, bad):
    with pytest.raises(ValueError, match=re.escape(bad)):
        Input(tag, lo, hi)


# --------------------------------------------------------------------------- 1-D families


@pytest.mark.parametrize("inp", [TI, FI, PI])
def test_legendre_values_match_numpy_and_scipy(inp):
    deg = 9
    x = _points(inp, np.random.default_rng(1))
    phi = Polynomial([inp], deg, family="legendre")(x[:, None])
    u = _u(x, inp)
    for k in range(deg + 1):
        # references: numpy.polynomial.legendre.legval, scipy.special.eval_legendre,
        # and numpy's Legendre class with domain [lo, hi] (mapping + evaluation together)
        np.testing.assert_allclose(phi[:, k], npleg.legval(u, np.eye(deg + 1)[k]), rtol=1e-12,
                                   atol=1e-12)
        np.testing.assert_allclose(phi[:, k], special.eval_legendre(k, u), rtol=1e-12, atol=1e-12)
        ref = npleg.Legendre.basis(k, domain=[inp.lo, inp.hi])(x)
        np.testing.assert_allclose(phi[:, k], ref, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("inp", [TI, FI, PI])
def test_chebyshev_values_match_numpy_and_scipy(inp):
    deg = 9
    x = _points(inp, np.random.default_rng(2))
    phi = Polynomial([inp], deg, family="chebyshev")(x[:, None])
    u = _u(x, inp)
    for k in range(deg + 1):
        # references: numpy.polynomial.chebyshev.chebval, scipy.special.eval_chebyt,
        # numpy's Chebyshev class with domain [lo, hi]
        np.testing.assert_allclose(phi[:, k], npcheb.chebval(u, np.eye(deg + 1)[k]), rtol=1e-12,
                                   atol=1e-12)
        np.testing.assert_allclose(phi[:, k], special.eval_chebyt(k, u), rtol=1e-12, atol=1e-12)
        ref = npcheb.Chebyshev.basis(k, domain=[inp.lo, inp.hi])(x)
        np.testing.assert_allclose(phi[:, k], ref, rtol=1e-10, atol=1e-10)


def test_range_ends_map_exactly_to_plus_minus_one():
    # standard identities: P_k(1) = T_k(1) = 1, P_k(-1) = T_k(-1) = (-1)^k
    deg = 7
    signs = (-1.0) ** np.arange(deg + 1)
    for inp in (TI, FI, PI, Input("AI-9", 0.1, 0.7)):
        for family in ("legendre", "chebyshev"):
            b = Polynomial([inp], deg, family=family)
            np.testing.assert_array_equal(b([inp.hi]), np.ones(deg + 1))
            np.testing.assert_array_equal(b([inp.lo]), signs)


def test_chebyshev_cosine_identity():
    # standard identity T_k(cos t) = cos(k t)
    t = np.linspace(0.0, np.pi, 33)
    inp = Input("XI-1", -1.0, 1.0)
    phi = Polynomial([inp], 8, family="chebyshev")(np.cos(t)[:, None])
    for k in range(9):
        np.testing.assert_allclose(phi[:, k], np.cos(k * t), atol=1e-12)


# --------------------------------------------------------------------------- products


def test_two_input_products_match_legval2d_and_chebval2d():
    rng = np.random.default_rng(3)
    inputs = [TI, FI]
    X = np.column_stack([_points(TI, rng), _points(FI, rng)])
    U = [_u(X[:, i], inp) for i, inp in enumerate(inputs)]
    deg = 4
    for family, val2d in (("legendre", npleg.legval2d), ("chebyshev", npcheb.chebval2d)):
        b = Polynomial(inputs, deg, family=family)
        phi = b(X)
        for j, (e1, e2) in enumerate(b.exponents):
            c = np.zeros((deg + 1, deg + 1))
            c[e1, e2] = 1.0
            # reference: numpy.polynomial.{legendre.legval2d, chebyshev.chebval2d}
            np.testing.assert_allclose(phi[:, j], val2d(U[0], U[1], c), rtol=1e-11, atol=1e-11)


def test_three_input_products_match_legval3d_and_scipy():
    rng = np.random.default_rng(4)
    inputs = [TI, FI, PI]
    X = np.column_stack([_points(inp, rng) for inp in inputs])
    U = [_u(X[:, i], inp) for i, inp in enumerate(inputs)]
    deg = 3
    b = Polynomial(inputs, deg)
    phi = b(X)
    for j, e in enumerate(b.exponents):
        c = np.zeros((deg + 1,) * 3)
        c[tuple(e)] = 1.0
        # references: numpy.polynomial.legendre.legval3d and a product of
        # scipy.special.eval_legendre factors
        np.testing.assert_allclose(phi[:, j], npleg.legval3d(*U, c), rtol=1e-11, atol=1e-11)
        prod = np.prod([special.eval_legendre(int(k), U[i]) for i, k in enumerate(e)], axis=0)
        np.testing.assert_allclose(phi[:, j], prod, rtol=1e-11, atol=1e-11)


def _sklearn_columns(pf: PolynomialFeatures) -> dict[tuple[int, ...], int]:
    return {tuple(int(v) for v in row): j for j, row in enumerate(pf.powers_)}


@pytest.mark.parametrize(("d", "deg"), [(1, 1), (1, 5), (2, 3), (3, 2), (3, 4), (5, 3)])
@pytest.mark.parametrize("scale", [False, True])
def test_monomial_matches_sklearn_polynomial_features(d, deg, scale):
    rng = np.random.default_rng(10 * d + deg)
    inputs = [Input(f"TAG-{i}", -2.0 + i, 3.0 + 2 * i) for i in range(d)]
    X = np.column_stack([rng.uniform(inp.lo - 1, inp.hi + 1, 25) for inp in inputs])
    b = Polynomial(inputs, deg, family="monomial", scale=scale)
    Z = np.column_stack([_u(X[:, i], inp) for i, inp in enumerate(inputs)]) if scale else X
    # reference: sklearn.preprocessing.PolynomialFeatures(degree, include_bias=True)
    pf = PolynomialFeatures(degree=deg, include_bias=True)
    ref = pf.fit_transform(Z)
    cols = _sklearn_columns(pf)
    ours = [tuple(int(v) for v in e) for e in b.exponents]
    assert set(ours) == set(cols)
    # count: binomial C(d + deg, deg) (math.comb), stars and bars
    assert b.n_features == len(ours) == math.comb(d + deg, deg) == ref.shape[1]
    phi = b(X)
    for j, e in enumerate(ours):
        np.testing.assert_allclose(phi[:, j], ref[:, cols[e]], rtol=1e-11, atol=1e-12)
    # our documented order (total degree, then descending lexicographic) coincides with
    # the column order scikit-learn produces
    assert ours == [tuple(int(v) for v in row) for row in pf.powers_]


@pytest.mark.parametrize(("d", "deg"), [(1, 4), (2, 3), (4, 2), (3, 5)])
def test_monomial_without_interactions_is_subset_of_sklearn(d, deg):
    rng = np.random.default_rng(d * deg)
    inputs = [Input(f"T{i}", 0.0, 10.0 + i) for i in range(d)]
    X = rng.uniform(-1.0, 12.0, (15, d))
    b = Polynomial(inputs, deg, family="monomial", scale=False, interactions=False)
    assert b.n_features == 1 + d * deg
    # reference: sklearn PolynomialFeatures columns with at most one nonzero exponent
    pf = PolynomialFeatures(degree=deg, include_bias=True)
    ref = pf.fit_transform(X)
    pure = {tuple(int(v) for v in row) for row in pf.powers_ if np.count_nonzero(row) <= 1}
    assert {tuple(int(v) for v in e) for e in b.exponents} == pure
    cols = _sklearn_columns(pf)
    phi = b(X)
    for j, e in enumerate(b.exponents):
        np.testing.assert_allclose(phi[:, j], ref[:, cols[tuple(int(v) for v in e)]], rtol=1e-11)


@pytest.mark.parametrize("family", FAMILIES)
@pytest.mark.parametrize(("d", "deg"), [(1, 1), (2, 2), (4, 3), (6, 2), (3, 6)])
def test_term_counts(family, d, deg):
    inputs = [Input(f"T{i}", 0.0, 1.0) for i in range(d)]
    full = Polynomial(inputs, deg, family=family)
    pure = Polynomial(inputs, deg, family=family, interactions=False)
    # binomial count of multi-indices of total degree <= deg (math.comb)
    assert full.n_features == math.comb(d + deg, deg) == len(full.names)
    assert pure.n_features == 1 + d * deg == len(pure.names)
    assert full.exponents.shape == (full.n_features, d)
    assert len(set(full.names)) == full.n_features
    assert int(full.exponents.sum(axis=1).max()) == deg


def test_identity_matches_degree_one_monomial_and_sklearn():
    rng = np.random.default_rng(5)
    inputs = [TI, FI, PI]
    X = rng.normal(50.0, 30.0, (12, 3))
    ident = Identity(inputs)
    phi = ident(X)
    np.testing.assert_array_equal(phi, np.column_stack([np.ones(12), X]))
    np.testing.assert_array_equal(phi, Polynomial(inputs, 1, family="monomial", scale=False)(X))
    # reference: sklearn PolynomialFeatures(degree=1, include_bias=True) -> [1, x]
    np.testing.assert_allclose(phi, PolynomialFeatures(1).fit_transform(X))
    assert ident.names == ("1", "TI-104", "FI-201", "PI-330")
    assert ident.n_features == 4 and ident.n_inputs == 3
    assert ident.tags == ("TI-104", "FI-201", "PI-330")
    np.testing.assert_array_equal(ident.unpenalized, [True, False, False, False])
    np.testing.assert_array_equal(ident.exponents, np.vstack([np.zeros(3), np.eye(3)]))


# --------------------------------------------------------------------------- orthogonality


def test_gauss_legendre_orthogonality_one_input():
    deg = 8
    inp = Input("TI-104", 20.0, 180.0)
    # 12-point Gauss-Legendre rule (numpy.polynomial.legendre.leggauss) is exact up to
    # polynomial degree 23 >= 2 * deg
    t, w = npleg.leggauss(12)
    x = inp.lo + (t + 1.0) * (inp.hi - inp.lo) / 2.0
    phi = Polynomial([inp], deg)(x[:, None])
    gram = phi.T @ (w[:, None] * phi)
    # standard identity: int_{-1}^{1} P_j P_k du = 2 / (2k + 1) delta_jk
    expected = np.diag(2.0 / (2.0 * np.arange(deg + 1) + 1.0))
    np.testing.assert_allclose(gram, expected, atol=1e-13)


def test_gauss_legendre_orthogonality_two_inputs():
    deg = 4
    t, w = npleg.leggauss(6)
    T1, T2 = np.meshgrid(t, t, indexing="ij")
    W = np.outer(w, w).ravel()
    X = np.column_stack(
        [TI.lo + (T1.ravel() + 1.0) * (TI.hi - TI.lo) / 2.0,
         FI.lo + (T2.ravel() + 1.0) * (FI.hi - FI.lo) / 2.0]
    )
    b = Polynomial([TI, FI], deg)
    phi = b(X)
    gram = phi.T @ (W[:, None] * phi)
    # tensor product of the 1-D identity: prod_i 2 / (2 e_i + 1)
    expected = np.diag(np.prod(2.0 / (2.0 * b.exponents + 1.0), axis=1))
    np.testing.assert_allclose(gram, expected, atol=1e-13)


# --------------------------------------------------------------------------- names, order


def test_names_legendre_degree_three():
    b = Polynomial([TI, FI], 3)
    assert b.names == (
        "1", "TI-104", "FI-201",
        "P2(TI-104)", "TI-104*FI-201", "P2(FI-201)",
        "P3(TI-104)", "P2(TI-104)*FI-201", "TI-104*P2(FI-201)", "P3(FI-201)",
    )  # fmt: skip
    assert b.tags == ("TI-104", "FI-201")
    assert b.n_inputs == 2 and b.n_features == 10


def test_names_chebyshev_and_monomial():
    assert Polynomial([TI, FI], 2, family="chebyshev").names == (
        "1", "TI-104", "FI-201", "T2(TI-104)", "TI-104*FI-201", "T2(FI-201)",
    )  # fmt: skip
    assert Polynomial([TI, FI], 2, family="monomial", scale=False).names == (
        "1", "TI-104", "FI-201", "TI-104^2", "TI-104*FI-201", "FI-201^2",
    )  # fmt: skip
    assert Polynomial([TI, FI, PI], 3, family="monomial").names[10:13] == (
        "TI-104^3", "TI-104^2*FI-201", "TI-104^2*PI-330",
    )  # fmt: skip


def test_names_without_interactions():
    b = Polynomial([TI, FI, PI], 3, interactions=False)
    assert b.names == (
        "1", "TI-104", "FI-201", "PI-330",
        "P2(TI-104)", "P2(FI-201)", "P2(PI-330)",
        "P3(TI-104)", "P3(FI-201)", "P3(PI-330)",
    )  # fmt: skip


def test_degree_one_order_is_constant_then_inputs():
    inputs = [Input(f"X{i}", 0.0, 1.0) for i in range(5)]
    for family in FAMILIES:
        b = Polynomial(inputs, 1, family=family)
        assert b.names == ("1", "X0", "X1", "X2", "X3", "X4")
        phi = b(np.full(5, 0.75))
        np.testing.assert_allclose(phi, [1.0] + [0.5] * 5)  # u = 2 * 0.75 - 1


def test_order_is_graded_then_descending_lexicographic():
    b = Polynomial([TI, FI, PI], 4)
    rows = [tuple(int(v) for v in e) for e in b.exponents]
    key = [(sum(r), tuple(-v for v in r)) for r in rows]
    assert key == sorted(key)
    assert len(set(rows)) == len(rows)
    assert rows[0] == (0, 0, 0)


# --------------------------------------------------------------------------- prior, flags


def test_unpenalized_mask_marks_only_constant():
    for b in (Identity([TI, FI]), Polynomial([TI, FI, PI], 3),
              Polynomial([TI], 4, interactions=False, family="chebyshev")):
        mask = b.unpenalized
        assert mask.dtype == bool and mask.shape == (b.n_features,)
        assert mask[0] and mask.sum() == 1
        np.testing.assert_array_equal(mask, b.exponents.sum(axis=1) == 0)
        assert b.names[0] == "1"
        with pytest.raises(ValueError):
            mask[0] = False  # read-only: shared with the prior


def test_alpha_vector_scalar_and_array():
    b = Polynomial([TI, FI], 2)
    a = b.alpha_vector(3.5)
    assert a.dtype == np.float64
    np.testing.assert_array_equal(a, [0.0, 3.5, 3.5, 3.5, 3.5, 3.5])
    np.testing.assert_array_equal(b.alpha_vector(0), np.zeros(6))
    np.testing.assert_array_equal(b.alpha_vector(np.float32(2.0)), [0.0] + [2.0] * 5)
    given_alpha = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]
    out = b.alpha_vector(given_alpha)
    assert out.dtype == np.float64
    np.testing.assert_array_equal(out, given_alpha)  # returned as is, constant included
    src = np.arange(6, dtype=np.int64)
    np.testing.assert_array_equal(b.alpha_vector(src), src.astype(float))


@pytest.mark.parametrize(
    ("alpha", "bad"),
    [
        (-1.0, "-1.0"),
        (float("nan"), "nan"),
        (float("inf"), "inf"),
        ("1", "'1'"),
        ([1.0, 2.0], "(2,)"),
        (np.ones((2, 3)), "(2, 3)"),
        ([1.0, 1.0, -1.0, 1.0, 1.0, 1.0], "-1."),
        ([1.0, 1.0, np.nan, 1.0, 1.0, 1.0], "nan"),
    ],
)
def test_alpha_vector_rejects_bad_values(alpha, bad):
    b = Polynomial([TI, FI], 2)
    with pytest.raises(ValueError, match=re.escape(bad)):
        b.alpha_vector(alpha)


def test_out_of_range_single_and_batch():
    b = Polynomial([TI, FI], 2)
    X = np.array(
        [
            [20.0, 0.0],  # both exactly at lo: in range (closed interval)
            [180.0, 50.0],  # both exactly at hi
            [19.999, 25.0],
            [100.0, 50.0001],
            [-5.0, 60.0],
            [np.nan, 25.0],  # nan is not flagged, by contract
        ]
    )
    expected = np.array(
        [[False, False], [False, False], [True, False], [False, True], [True, True],
         [False, False]]
    )
    flags = b.out_of_range(X)
    assert flags.dtype == bool and flags.shape == (6, 2)
    np.testing.assert_array_equal(flags, expected)
    for row, exp in zip(X, expected, strict=True):
        single = b.out_of_range(row)
        assert single.shape == (2,)
        np.testing.assert_array_equal(single, exp)
    with pytest.raises(ValueError, match=re.escape("(3,)")):
        b.out_of_range([1.0, 2.0, 3.0])
    # the row count, with its shortcut for all-in-range batches (nan rows included)
    assert b.rows_out_of_range(X) == 3
    assert b.rows_out_of_range(X[[0, 1]]) == 0
    assert b.rows_out_of_range(X[[0, 5]]) == 0
    assert b.rows_out_of_range(X[[2]]) == 1
    assert b.rows_out_of_range(np.empty((0, 2))) == 0


# --------------------------------------------------------------------------- shapes


def test_single_row_equals_batch_row_and_shapes():
    rng = np.random.default_rng(6)
    X = np.column_stack([_points(TI, rng, 10), _points(FI, rng, 10)])
    for b in (Identity([TI, FI]), Polynomial([TI, FI], 3),
              Polynomial([TI, FI], 2, family="monomial", scale=False)):
        batch = b(X)
        assert batch.shape == (len(X), b.n_features) and batch.dtype == np.float64
        for i, row in enumerate(X):
            single = b(row)
            assert single.shape == (b.n_features,) and single.dtype == np.float64
            np.testing.assert_array_equal(single, batch[i])
        assert b(X[:0]).shape == (0, b.n_features)
        assert b([list(X[0])]).shape == (1, b.n_features)  # list of lists is a batch


def test_integer_input_gives_float_output():
    b = Polynomial([Input("N-1", 0, 10)], 2, family="monomial", scale=False)
    out = b(np.array([[3], [4]], dtype=np.int64))
    assert out.dtype == np.float64
    np.testing.assert_array_equal(out, [[1.0, 3.0, 9.0], [1.0, 4.0, 16.0]])


def test_nan_propagates_only_to_terms_using_that_input():
    b = Polynomial([TI, FI], 2)
    out = b([np.nan, 25.0])
    uses_ti = b.exponents[:, 0] > 0
    assert np.all(np.isnan(out[uses_ti]))
    assert np.all(np.isfinite(out[~uses_ti]))
    assert out[0] == 1.0
    ident = Identity([TI, FI])
    np.testing.assert_array_equal(np.isnan(ident([1.0, np.inf - np.inf])), [False, False, True])


@pytest.mark.parametrize(
    ("X", "bad"),
    [
        ([1.0], "(1,)"),
        ([1.0, 2.0, 3.0], "(3,)"),
        (np.zeros((4, 3)), "(4, 3)"),
        (np.zeros((2, 2, 2)), "(2, 2, 2)"),
        (5.0, "()"),
        (["a", "b"], "'a'"),
    ],
)
def test_wrong_x_raises(X, bad):
    for b in (Identity([TI, FI]), Polynomial([TI, FI], 2)):
        with pytest.raises(ValueError, match=re.escape(bad)):
            b(X)


# --------------------------------------------------------------------------- constructor errors


@pytest.mark.parametrize(
    ("degree", "bad"), [(0, "0"), (-2, "-2"), (2.0, "2.0"), (2.5, "2.5"), (True, "True"),
                        ("2", "'2'"), (None, "None")]
)
def test_bad_degree(degree, bad):
    with pytest.raises(ValueError, match=re.escape(f"got {bad}")):
        Polynomial([TI], degree)


def test_numpy_integer_degree_accepted():
    assert Polynomial([TI], np.int64(3)) == Polynomial([TI], 3)


@pytest.mark.parametrize("family", ["hermite", "Legendre", "", None, 1])
def test_bad_family(family):
    with pytest.raises(ValueError, match=re.escape(repr(family))):
        Polynomial([TI], 2, family=family)


@pytest.mark.parametrize("family", ["legendre", "chebyshev"])
def test_scale_false_only_for_monomial(family):
    with pytest.raises(ValueError, match=re.escape(repr(family))):
        Polynomial([TI], 2, family=family, scale=False)


def test_bad_flags():
    with pytest.raises(ValueError, match="interactions"):
        Polynomial([TI], 2, interactions="yes")
    with pytest.raises(ValueError, match="scale"):
        Polynomial([TI], 2, family="monomial", scale=1)


def test_duplicate_tag():
    dup = Input("TI-104", 0.0, 1.0)
    for make in (lambda ins: Identity(ins), lambda ins: Polynomial(ins, 2)):
        with pytest.raises(ValueError, match=re.escape("'TI-104'")):
            make([TI, FI, dup])


@pytest.mark.parametrize(
    ("inputs", "bad"), [([], "empty"), (TI, "Input(tag='TI-104'"), ([TI, ("FI", 0, 1)], "'FI'"),
                        ("TI-104", "'TI-104'")]
)
def test_bad_inputs(inputs, bad):
    for cls in (Identity, lambda ins: Polynomial(ins, 2)):
        with pytest.raises(ValueError, match=re.escape(bad)):
            cls(inputs)


def test_base_class_is_abstract():
    with pytest.raises(TypeError):
        Basis([TI])  # type: ignore[abstract]


# --------------------------------------------------------------------------- serialisation


@pytest.mark.parametrize(
    "basis",
    [
        Identity([TI, FI, PI]),
        Polynomial([TI, FI], 3),
        Polynomial([TI, FI, PI], 2, interactions=False, family="chebyshev"),
        Polynomial([PI], 4, family="monomial", scale=False),
        Polynomial([Input("AI-7", 0.1, 0.30000000000000004)], 2, family="monomial"),
    ],
)
def test_to_dict_from_dict_round_trip(basis):
    d = basis.to_dict()
    assert d["kind"] in ("identity", "polynomial")
    assert d["schema_version"] == 1
    via_json = json.loads(json.dumps(d))
    for data in (d, via_json):
        rebuilt = from_dict(data)
        assert type(rebuilt) is type(basis)
        assert rebuilt == basis and hash(rebuilt) == hash(basis)
        assert rebuilt.names == basis.names
        np.testing.assert_array_equal(rebuilt.exponents, basis.exponents)
        x = [0.5 * (inp.lo + inp.hi) + 0.1 for inp in basis.inputs]
        np.testing.assert_array_equal(rebuilt(x), basis(x))
    assert via_json == d


def test_equality_distinguishes_specs():
    base = Polynomial([TI, FI], 2)
    assert base == Polynomial([Input("TI-104", 20, 180), Input("FI-201", 0, 50)], 2)
    assert base != Polynomial([TI, FI], 3)
    assert base != Polynomial([FI, TI], 2)
    assert base != Polynomial([TI, FI], 2, family="chebyshev")
    assert base != Polynomial([TI, FI], 2, interactions=False)
    assert base != Polynomial([TI, Input("FI-201", 0.0, 51.0)], 2)
    mono = Polynomial([TI, FI], 1, family="monomial", scale=False)
    assert mono != Polynomial([TI, FI], 1, family="monomial", scale=True)
    assert mono != Identity([TI, FI])  # same values, different kind
    assert Identity([TI, FI]) == Identity([TI, FI])
    assert base != "polynomial"


def test_from_dict_defaults_for_optional_polynomial_keys():
    d = {"kind": "polynomial", "schema_version": 1, "degree": 2,
         "inputs": [{"tag": "TI-104", "lo": 20.0, "hi": 180.0}]}
    assert from_dict(d) == Polynomial([TI], 2)


@pytest.mark.parametrize(
    ("mutate", "bad"),
    [
        (lambda d: d.update(kind="spline"), "'spline'"),
        (lambda d: d.pop("kind"), "None"),
        (lambda d: d.update(schema_version=2), "2"),
        (lambda d: d.pop("schema_version"), "None"),
        (lambda d: d.pop("degree"), "degree"),
        (lambda d: d.update(degree=0), "0"),
        (lambda d: d.update(family="hermite"), "'hermite'"),
        (lambda d: d.update(inputs="TI-104"), "'TI-104'"),
        (lambda d: d["inputs"][0].pop("hi"), "hi"),
        (lambda d: d["inputs"][0].update(lo=500.0), "lo=500.0"),
        (lambda d: d["inputs"].append(d["inputs"][0]), "duplicate"),
    ],
)
def test_from_dict_rejects_bad_descriptions(mutate, bad):
    d = Polynomial([TI, FI], 2).to_dict()
    mutate(d)
    with pytest.raises(ValueError, match=re.escape(bad)):
        from_dict(d)


def test_from_dict_rejects_non_mapping():
    with pytest.raises(ValueError, match=re.escape("[1, 2]")):
        from_dict([1, 2])


# --------------------------------------------------------------------------- property


@st.composite
def _basis_and_rows(draw):
    d = draw(st.integers(1, 3))
    inputs = []
    for i in range(d):
        lo = draw(st.floats(-1e3, 1e3, allow_nan=False))
        width = draw(st.floats(1e-2, 1e3, allow_nan=False))
        inputs.append(Input(f"TAG-{i}", lo, lo + width))
    kind = draw(st.sampled_from(["identity", *FAMILIES]))
    if kind == "identity":
        basis: Basis = Identity(inputs)
    else:
        scale = True if kind != "monomial" else draw(st.booleans())
        basis = Polynomial(inputs, draw(st.integers(1, 4)), family=kind,
                           interactions=draw(st.booleans()), scale=scale)
    X = draw(hnp.arrays(np.float64, (draw(st.integers(0, 8)), d),
                        elements=st.floats(-1e4, 1e4, allow_nan=False)))
    return basis, X


@settings(max_examples=60, deadline=None, derandomize=True)
@given(_basis_and_rows())
def test_batch_equals_row_by_row(case):
    basis, X = case
    batch = basis(X)
    assert batch.shape == (X.shape[0], basis.n_features)
    rows = np.array([basis(x) for x in X]).reshape(X.shape[0], basis.n_features)
    np.testing.assert_array_equal(batch, rows)
    flags = basis.out_of_range(X)
    np.testing.assert_array_equal(flags, np.array([basis.out_of_range(x) for x in X],
                                                  dtype=bool).reshape(X.shape))


def test_rows_out_of_range_flags_and_count_agree_with_out_of_range():
    # reference: the elementwise out_of_range(X) of the same basis, reduced with numpy
    b = Polynomial([Input("a", -1.0, 1.0), Input("b", 0.0, 10.0)], degree=2)
    rng = np.random.default_rng(3)
    X = np.column_stack([rng.uniform(-1.2, 1.2, 200), rng.uniform(-1.0, 11.0, 200)])
    want = b.out_of_range(X).any(axis=1)
    assert b.rows_out_of_range(X) == int(want.sum()) > 0
    assert b.rows_out_of_range_flags(X).tolist() == want.astype(float).tolist()
    inside = X[~want]
    assert b.rows_out_of_range(inside) == 0 and b.rows_out_of_range_flags(inside) is None
    assert b.rows_out_of_range(X[:0]) == 0 and b.rows_out_of_range_flags(X[:0]) is None
    # a Fortran-ordered or sliced array gives the same answer
    assert b.rows_out_of_range(np.asfortranarray(X)) == int(want.sum())
    assert b.rows_out_of_range(X[::2]) == int(want[::2].sum())
