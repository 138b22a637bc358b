"""Binned Poisson maximum-likelihood fits shared by the line fits and the modulation-curve fit.

The model returns the *expected counts per bin* (already integrated over each bin). The fit minimises the Poisson
deviance ``2 * sum(mu - n + n ln(n / mu))`` as the sum of squared signed deviance residuals with
:func:`scipy.optimize.least_squares` (falling back to :func:`scipy.optimize.minimize`); the covariance is the inverse of
the expected Fisher information ``J^T diag(1/mu) J`` with ``J = d mu / d theta`` from central
finite differences. The deviance is also the goodness-of-fit statistic (asymptotically
chi-square with ``n_bins - n_params`` degrees of freedom; Baker & Cousins 1984).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

__all__ = ["BinnedFit", "fit_binned_poisson", "poisson_deviance"]

_TINY = 1e-12


def poisson_deviance(counts, expected) -> float:
    """``2 * sum(mu - n + n ln(n / mu))`` (terms with ``n = 0`` reduce to ``2 mu``)."""
    n = np.asarray(counts, dtype=float)
    mu = np.maximum(np.asarray(expected, dtype=float), _TINY)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_term = np.where(n > 0, n * np.log(n / mu), 0.0)
    return float(2.0 * np.sum(mu - n + log_term))


@dataclass(frozen=True, kw_only=True)
class BinnedFit:
    """Outcome of :func:`fit_binned_poisson`.

    Attributes
    ----------
    params, cov : ndarray
        Best-fit parameters and their covariance (inverse expected Fisher information).
    deviance : float
        Poisson deviance at the minimum (likelihood-ratio goodness of fit).
    chi2 : float
        Pearson chi-square ``sum((n - mu)^2 / mu)`` at the minimum.
    ndof : int
        ``n_bins - n_free_params``.
    success : bool
        Whether the minimiser reported convergence and the covariance is finite.
    """

    params: np.ndarray
    cov: np.ndarray
    deviance: float
    chi2: float
    ndof: int
    success: bool
    message: str = ""

    @property
    def errors(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.cov), 0.0, None))


def fit_binned_poisson(model, counts, p0, *, bounds=None, scale=None, fixed=(), polish=False) -> BinnedFit:
    """Maximum-likelihood fit of expected bin counts ``model(params)`` to observed ``counts``.

    Parameters
    ----------
    model : callable
        ``model(params) -> ndarray`` of expected counts, same shape as ``counts``.
    counts : array_like
        Observed counts per bin (non-negative).
    p0 : array_like
        Starting values (fixed parameters keep them).
    bounds : sequence of (low, high), optional
        Bounds per parameter (``None`` for open), passed to L-BFGS-B.
    scale : array_like, optional
        Typical size of each parameter; the minimiser works on ``params / scale`` (default ``|p0|`` or 1).
    fixed : sequence of int
        Indices of parameters held at their starting value (zero rows and columns in ``cov``).
    polish : bool
        Always follow with L-BFGS-B and Nelder-Mead passes (otherwise only when the previous one did not converge).
    """
    counts = np.asarray(counts, dtype=float)
    p0 = np.asarray(p0, dtype=float)
    n_par = p0.size
    free = np.setdiff1d(np.arange(n_par), np.asarray(fixed, dtype=int))
    if scale is None:
        scale = np.where(np.abs(p0) > 0, np.abs(p0), 1.0)
    scale = np.asarray(scale, dtype=float)[free]
    bounds = [(None, None)] * n_par if bounds is None else list(bounds)
    lo = np.array([-np.inf if bounds[k][0] is None else bounds[k][0] for k in free]) / scale
    hi = np.array([np.inf if bounds[k][1] is None else bounds[k][1] for k in free]) / scale

    def full(z):
        params = p0.copy()
        params[free] = z * scale
        return params

    n_flat = counts.ravel()
    positive = n_flat > 0
    n_pos = n_flat[positive]
    constant = float(np.sum(n_pos * np.log(n_pos)) - n_flat.sum())

    def objective(z):  # the Poisson deviance, with the data-only terms precomputed
        mu = np.maximum(model(full(z)).ravel(), _TINY)
        return 2.0 * (mu.sum() - n_pos @ np.log(mu[positive]) + constant)

    z0 = np.clip(p0[free] / scale, lo, hi)
    n_log_n = np.where(positive, n_flat * np.log(np.where(positive, n_flat, 1.0)), 0.0)

    def residuals(z):  # signed deviance residuals: their squares sum to the deviance, smooth through zero
        mu = np.maximum(model(full(z)).ravel(), _TINY)
        d = 2.0 * (mu - n_flat + n_log_n - n_flat * np.log(mu))
        return np.sign(n_flat - mu) * np.sqrt(np.maximum(d, 0.0))

    # Gauss-Newton on the deviance residuals converges in a few iterations; L-BFGS-B and Nelder-Mead are
    # the fallbacks when it does not
    width = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    z_start = np.clip(z0, lo + 1e-9 * width, hi - 1e-9 * width)
    ls = optimize.least_squares(residuals, z_start, bounds=(lo, hi), method="trf", x_scale=1.0,
                                ftol=1e-12, xtol=1e-12, gtol=1e-12, max_nfev=400)
    z, fun, converged = ls.x, objective(ls.x), ls.status > 0
    message = str(ls.message)
    if not converged or polish:
        result = optimize.minimize(objective, z, method="L-BFGS-B", bounds=list(zip(lo, hi, strict=True)),
                                   options={"maxiter": 2000, "ftol": 1e-11, "gtol": 1e-7})
        if result.fun <= fun:
            z, fun = result.x, result.fun
        converged, message = bool(result.success), str(result.message)
        if polish or not converged:
            refined = optimize.minimize(objective, z, method="Nelder-Mead", bounds=list(zip(lo, hi, strict=True)),
                                        options={"xatol": 1e-8, "fatol": 1e-9, "maxiter": 4000})
            if refined.fun <= fun:
                z = refined.x
            converged = converged or bool(refined.success)
    params = full(z)
    mu = model(params).ravel()
    # expected Fisher information of the free parameters; bins with negligible expectation carry no
    # information but would amplify finite-difference noise, so they are left out
    use = mu > 1e-9 * max(mu.max(), 1e-300)
    jac = np.empty((int(use.sum()), free.size))
    for j, k in enumerate(free):  # central differences, one parameter at a time
        step = 1e-5 * max(abs(params[k]), scale[j] * 1e-2)
        dp = np.zeros(n_par)
        dp[k] = step
        jac[:, j] = (model(params + dp).ravel()[use] - model(params - dp).ravel()[use]) / (2 * step)
    fisher = jac.T @ (jac / mu[use][:, None])
    cov = np.zeros((n_par, n_par))
    try:
        cov[np.ix_(free, free)] = np.linalg.inv(fisher)
        ok = bool(np.all(np.isfinite(cov)) and np.all(np.diag(cov) >= 0))
    except np.linalg.LinAlgError:
        cov[np.ix_(free, free)] = np.nan
        ok = False
    mu_c = np.maximum(mu, _TINY)
    chi2 = float(np.sum((counts.ravel() - mu_c) ** 2 / mu_c))
    return BinnedFit(params=params, cov=cov, deviance=poisson_deviance(counts, mu), chi2=chi2,
                     ndof=int(counts.size - free.size), success=converged and ok, message=message)
