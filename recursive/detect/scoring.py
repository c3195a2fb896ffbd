"""Proper scores of a normal or Student-t predictive: :func:`log_score_normal`,
:func:`log_score_t`, :func:`crps_normal`, :func:`crps_t`, scalar and broadcast array forms,
and the special-function helpers they share with :mod:`recursive.detect.calibration`."""

import math
from typing import Any

import numpy as np
import scipy.special

from recursive.detect._common import _INF

_SQRT2 = math.sqrt(2.0)
_INV_SQRT_PI = 1.0 / math.sqrt(math.pi)
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)
_HALF_LOG_PI = 0.5 * math.log(math.pi)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)

# Above this argument the asymptotic series for ln Γ(x + 1/2) - ln Γ(x) is accurate to a few
# ulp, whereas the difference of two large lgamma values loses digits as x grows.
_G_SWITCH = 30.0


def _half_gamma_ratio(x: float) -> float:
    """ln Γ(x + 1/2) - ln Γ(x) for scalar x > 0."""
    if x < _G_SWITCH:
        return math.lgamma(x + 0.5) - math.lgamma(x)
    inv = 1.0 / x
    inv2 = inv * inv
    return 0.5 * math.log(x) + inv * (
        -0.125 + inv2 * (1.0 / 192.0 + inv2 * (-1.0 / 640.0 + inv2 * (17.0 / 14336.0)))
    )


def _half_gamma_ratio_array(x: np.ndarray) -> np.ndarray:
    small = x < _G_SWITCH
    xs = np.where(small, x, 1.0)
    xl = np.where(small, _G_SWITCH, x)
    direct = scipy.special.gammaln(xs + 0.5) - scipy.special.gammaln(xs)
    inv = 1.0 / xl
    inv2 = inv * inv
    series = 0.5 * np.log(xl) + inv * (
        -0.125 + inv2 * (1.0 / 192.0 + inv2 * (-1.0 / 640.0 + inv2 * (17.0 / 14336.0)))
    )
    return np.where(small, direct, series)


def _is_scalar(*args: Any) -> bool:
    for a in args:
        if isinstance(a, bool) or not isinstance(a, (float, int)):
            return False
    return True


def _first_bad(arr: np.ndarray, ok: np.ndarray) -> Any:
    return arr[~ok].flat[0].item()


def _check_scale_scalar(name: str, scale: float) -> float:
    s = float(scale)
    if not (s > 0.0 and s < _INF):
        raise ValueError(f"{name} must be finite and > 0, got {scale!r}")
    return s


def _check_dof_scalar(dof: float, minimum: float) -> float:
    d = float(dof)
    if not d > minimum:  # also rejects nan
        raise ValueError(f"dof must be > {minimum:g} (inf allowed), got {dof!r}")
    return d


def _arrays(y: Any, mu: Any, scale: Any, name: str, dof: Any = None) -> tuple:
    arrs = [np.asarray(y, dtype=float), np.asarray(mu, dtype=float), np.asarray(scale, dtype=float)]
    if dof is not None:
        arrs.append(np.asarray(dof, dtype=float))
    arrs = np.broadcast_arrays(*arrs)
    s = arrs[2]
    ok = (s > 0.0) & np.isfinite(s)
    if not np.all(ok):
        raise ValueError(f"{name} must be finite and > 0, got {_first_bad(s, ok)!r}")
    return tuple(arrs)


def _check_dof_array(dof: np.ndarray, minimum: float) -> None:
    ok = dof > minimum
    if not np.all(ok):
        raise ValueError(f"dof must be > {minimum:g} (inf allowed), got {_first_bad(dof, ok)!r}")


def _out(x: np.ndarray) -> Any:
    return float(x) if x.ndim == 0 else x


def log_score_normal(y: Any, mu: Any, sigma: Any) -> Any:
    """Negative log predictive density of ``y`` under N(mu, sigma^2).

    Parameters
    ----------
    y, mu, sigma : float or array_like
        Observation, predictive mean and predictive standard deviation (``> 0``); broadcast.

    Returns
    -------
    float or ndarray
        :math:`-\\ln p(y)`; a float when all inputs are scalars.

    Notes
    -----
    .. math:: -\\ln p(y) = \\tfrac12 \\ln(2\\pi) + \\ln\\sigma + \\tfrac12 z^2,
              \\quad z = (y - \\mu)/\\sigma.
    """
    if _is_scalar(y, mu, sigma):
        s = _check_scale_scalar("sigma", sigma)
        z = (y - mu) / s
        return _HALF_LOG_2PI + math.log(s) + 0.5 * z * z
    y_, mu_, s_ = _arrays(y, mu, sigma, "sigma")
    z = (y_ - mu_) / s_
    return _out(_HALF_LOG_2PI + np.log(s_) + 0.5 * z * z)


def _t_log_density_std(z: float, dof: float) -> float:
    """ln f_nu(z) for the standard Student-t."""
    return (
        _half_gamma_ratio(0.5 * dof)
        - 0.5 * math.log(dof)
        - _HALF_LOG_PI
        - 0.5 * (dof + 1.0) * math.log1p(z * z / dof)
    )


def _t_log_density_std_array(z: np.ndarray, dof: np.ndarray) -> np.ndarray:
    return (
        _half_gamma_ratio_array(0.5 * dof)
        - 0.5 * np.log(dof)
        - _HALF_LOG_PI
        - 0.5 * (dof + 1.0) * np.log1p(z * z / dof)
    )


def log_score_t(y: Any, mu: Any, scale: Any, dof: Any) -> Any:
    """Negative log predictive density of ``y`` under a location-scale Student-t.

    Parameters
    ----------
    y, mu : float or array_like
        Observation and location.
    scale : float or array_like
        Scale, ``> 0``.
    dof : float or array_like
        Degrees of freedom, ``> 0``; ``inf`` gives :func:`log_score_normal` exactly.

    Returns
    -------
    float or ndarray
        :math:`-\\ln p(y)`; a float when all inputs are scalars.

    Notes
    -----
    With :math:`z = (y - \\mu)/s`,

    .. math::

        -\\ln p(y) = \\ln s - \\ln\\Gamma\\!\\left(\\tfrac{\\nu+1}{2}\\right)
        + \\ln\\Gamma\\!\\left(\\tfrac{\\nu}{2}\\right) + \\tfrac12\\ln(\\nu\\pi)
        + \\tfrac{\\nu+1}{2}\\ln\\!\\left(1 + \\tfrac{z^2}{\\nu}\\right).

    The gamma-function difference :math:`g(x) = \\ln\\Gamma(x+\\frac12) - \\ln\\Gamma(x)` is
    evaluated for :math:`x \\ge 30` from its asymptotic series
    :math:`\\frac12\\ln x - \\frac{1}{8x} + \\frac{1}{192x^3} - \\frac{1}{640x^5}
    + \\frac{17}{14336x^7}` (from Stirling's series with Bernoulli polynomials), which stays
    accurate for very large :math:`\\nu`.
    """
    if _is_scalar(y, mu, scale, dof):
        s = _check_scale_scalar("scale", scale)
        d = _check_dof_scalar(dof, 0.0)
        z = (y - mu) / s
        if d == _INF:
            return _HALF_LOG_2PI + math.log(s) + 0.5 * z * z
        return math.log(s) - _t_log_density_std(z, d)
    y_, mu_, s_, d_ = _arrays(y, mu, scale, "scale", dof)
    _check_dof_array(d_, 0.0)
    z = (y_ - mu_) / s_
    inf = np.isinf(d_)
    d_safe = np.where(inf, 2.0, d_)
    t_part = np.log(s_) - _t_log_density_std_array(z, d_safe)
    n_part = _HALF_LOG_2PI + np.log(s_) + 0.5 * z * z
    return _out(np.where(inf, n_part, t_part))


def crps_normal(y: Any, mu: Any, sigma: Any) -> Any:
    """Continuous ranked probability score of N(mu, sigma^2) at ``y`` (closed form).

    Parameters
    ----------
    y, mu, sigma : float or array_like
        Observation, predictive mean and standard deviation (``> 0``); broadcast.

    Returns
    -------
    float or ndarray
        CRPS in the units of ``y``; a float when all inputs are scalars.

    Notes
    -----
    :math:`\\mathrm{CRPS}(F, y) = \\int (F(x) - \\mathbf 1\\{x \\ge y\\})^2 dx`; for the normal
    (Gneiting & Raftery 2007), with :math:`z = (y-\\mu)/\\sigma`,

    .. math::

        \\mathrm{CRPS} = \\sigma\\left[z\\,(2\\Phi(z) - 1) + 2\\varphi(z)
        - \\frac{1}{\\sqrt\\pi}\\right].

    :math:`z(2\\Phi(z)-1)` is evaluated as :math:`|z|(1 - 2\\Phi(-|z|))` so that the tail
    probability keeps its relative accuracy.
    """
    if _is_scalar(y, mu, sigma):
        s = _check_scale_scalar("sigma", sigma)
        z = (y - mu) / s
        az = abs(z)
        tail = 0.5 * math.erfc(az / _SQRT2)
        pdf = _INV_SQRT_2PI * math.exp(-0.5 * z * z)
        return s * (az * (1.0 - 2.0 * tail) + 2.0 * pdf - _INV_SQRT_PI)
    y_, mu_, s_ = _arrays(y, mu, sigma, "sigma")
    z = (y_ - mu_) / s_
    az = np.abs(z)
    tail = scipy.special.ndtr(-az)
    pdf = _INV_SQRT_2PI * np.exp(-0.5 * z * z)
    return _out(s_ * (az * (1.0 - 2.0 * tail) + 2.0 * pdf - _INV_SQRT_PI))


def _crps_t_std_const(dof: float) -> float:
    """2 sqrt(nu)/(nu - 1) * B(1/2, nu - 1/2) / B(1/2, nu/2)^2 for scalar nu > 1."""
    log_ratio = 2.0 * _half_gamma_ratio(0.5 * dof) - _half_gamma_ratio(dof - 0.5) - _HALF_LOG_PI
    return 2.0 * math.sqrt(dof) / (dof - 1.0) * math.exp(log_ratio)


def crps_t(y: Any, mu: Any, scale: Any, dof: Any) -> Any:
    """CRPS of a location-scale Student-t predictive at ``y`` (closed form).

    Parameters
    ----------
    y, mu : float or array_like
        Observation and location.
    scale : float or array_like
        Scale, ``> 0``.
    dof : float or array_like
        Degrees of freedom, ``> 1`` (the CRPS is infinite for ``dof <= 1``); ``inf`` gives
        :func:`crps_normal` exactly.

    Returns
    -------
    float or ndarray
        CRPS in the units of ``y``; a float when all inputs are scalars.

    Notes
    -----
    For the standard t with :math:`\\nu > 1` degrees of freedom, CDF :math:`F_\\nu` and density
    :math:`f_\\nu`, and :math:`z = (y - \\mu)/s`,

    .. math::

        \\mathrm{CRPS} = s\\left[z\\,(2F_\\nu(z) - 1)
        + 2 f_\\nu(z)\\,\\frac{\\nu + z^2}{\\nu - 1}
        - \\frac{2\\sqrt{\\nu}}{\\nu - 1}
          \\frac{B(\\frac12, \\nu - \\frac12)}{B(\\frac12, \\frac\\nu2)^2}\\right].

    The beta-function ratio equals :math:`\\exp(2g(\\nu/2) - g(\\nu - \\frac12))/\\sqrt\\pi`
    with :math:`g(x) = \\ln\\Gamma(x+\\frac12) - \\ln\\Gamma(x)` (see :func:`log_score_t`);
    as :math:`\\nu \\to \\infty` the bracket tends to the normal one.
    """
    if _is_scalar(y, mu, scale, dof):
        s = _check_scale_scalar("scale", scale)
        d = _check_dof_scalar(dof, 1.0)
        if d == _INF:
            return crps_normal(y, mu, s)
        z = (y - mu) / s
        return s * _crps_t_std(z, d)
    y_, mu_, s_, d_ = _arrays(y, mu, scale, "scale", dof)
    _check_dof_array(d_, 1.0)
    z = (y_ - mu_) / s_
    inf = np.isinf(d_)
    d = np.where(inf, 2.0, d_)
    az = np.abs(z)
    tail = scipy.special.stdtr(d, -az)
    pdf = np.exp(_t_log_density_std_array(z, d))
    log_ratio = (
        2.0 * _half_gamma_ratio_array(0.5 * d) - _half_gamma_ratio_array(d - 0.5) - _HALF_LOG_PI
    )
    const = 2.0 * np.sqrt(d) / (d - 1.0) * np.exp(log_ratio)
    t_part = s_ * (az * (1.0 - 2.0 * tail) + 2.0 * pdf * (d + z * z) / (d - 1.0) - const)
    n_part = crps_normal(y_, mu_, s_)
    return _out(np.where(inf, n_part, t_part))


def _crps_t_std(z: float, dof: float) -> float:
    az = abs(z)
    tail = float(scipy.special.stdtr(dof, -az))
    pdf = math.exp(_t_log_density_std(z, dof))
    return (
        az * (1.0 - 2.0 * tail) + 2.0 * pdf * (dof + z * z) / (dof - 1.0) - _crps_t_std_const(dof)
    )
