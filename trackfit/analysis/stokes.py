"""Unbinned Stokes analysis: Stokes parameters, polarization degree and angle, Rice intervals, MDP.

Per event ``q_k = cos 2phi_k``, ``u_k = sin 2phi_k`` (Kislat et al. 2015). With a per-event modulation factor
``mu_k`` (from a calibrated curve at the event energy), per-event weight ``w_k`` and spurious modulation
``(Q_sp, U_sp)`` at the event's energy and position (Rankin et al. 2022), each event contributes the
modulation-corrected values ``Q_k = 2 (q_k - Q_sp,k) / mu_k`` and ``U_k = 2 (u_k - U_sp,k) / mu_k``, whose
expectations are ``p cos 2psi`` and ``p sin 2psi``. The normalized, modulation-corrected Stokes parameters are the
weighted means ``Q = sum w Q_k / sum w`` (for one ``mu`` and no weights this is ``(2/mu) Q/I`` of Kislat et al.).

Errors: the sums are compound-Poisson (variance of ``sum w Q_k`` is ``sum w^2 Q_k^2``), propagated through the
ratio; for one ``mu`` without weights this equals ``sqrt((2 - Q^2 mu^2)/(N mu^2))`` of Kislat et al. (2015) up to
``N`` vs ``N - 1``. Sums are additive, so an off-source background scaled by ``r = (A_on T_on)/(A_off T_off)`` is
subtracted as ``S_on - r S_off`` with variances ``V_on + r^2 V_off``.

What to use when: :func:`stokes_parameters` for a list of angles (the common case);
:func:`stokes_sums` + :meth:`StokesSums.subtract` for background subtraction; :func:`stokes_in_bands` per
energy band; :func:`mdp99` for planning; :func:`rice_interval` for the confidence interval of a degree.

References
----------
Kislat, Clark, Beilicke & Krawczynski 2015, Astropart. Phys. 68, 45 (arXiv:1409.6214).
Weisskopf, Elsner & O'Dell 2010, Proc. SPIE 7732 (MDP).
Di Marco et al. 2022, AJ 163, 170 (arXiv:2202.01093) (weights).
"""

from __future__ import annotations

import html
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import optimize, stats

__all__ = [
    "MDP99_CONSTANT",
    "DETECTION_P_VALUE",
    "ONE_SIGMA_LEVEL",
    "StokesSums",
    "StokesResult",
    "StokesBands",
    "stokes_sums",
    "stokes_parameters",
    "stokes_in_bands",
    "mdp99",
    "rice_interval",
    "ellipticity_weights",
]

#: ``sqrt(-2 ln 0.01) * sqrt(2)`` = 4.29193 (Weisskopf et al. 2010)
MDP99_CONSTANT = float(np.sqrt(-2.0 * np.log(0.01)) * np.sqrt(2.0))
#: a polarization is detected when unpolarized light gives a degree at least as large with a smaller probability
#: (the 99 % level of the MDP99; Weisskopf et al. 2010); below it the angle is undefined
DETECTION_P_VALUE = 0.01
#: probability content of +-1 sigma of a Gaussian, 0.6827
ONE_SIGMA_LEVEL = float(stats.norm.cdf(1.0) - stats.norm.cdf(-1.0))


def _as_events(name, value, n, *, default=None):
    if value is None:
        return default
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        return np.full(n, float(arr))
    if arr.shape != (n,):
        raise ValueError(f"'{name}' must be a scalar or have one value per event, shape ({n},) (got {arr.shape})")
    return arr


@dataclass(frozen=True, kw_only=True)
class StokesSums:
    """Additive sums over events from which Stokes parameters and their errors follow.

    ``i = sum w``, ``q = sum w Q_k``, ``u = sum w U_k``; second moments ``w2 = sum w^2``, ``qq = sum w^2 Q_k^2``,
    ``uu``, ``qu``, ``qi = sum w^2 Q_k``, ``ui``; ``m2 = sum w^2 / mu_k^2`` (for the MDP); ``n_events``;
    ``extra_var_q``, ``extra_var_u``: variance of the ``q``, ``u`` sums from other sources than counting.
    """

    i: float
    q: float
    u: float
    w2: float
    qq: float
    uu: float
    qu: float
    qi: float
    ui: float
    m2: float
    n_events: int
    n_background: int = 0
    background_scale: float = 0.0
    extra_var_q: float = 0.0
    extra_var_u: float = 0.0

    def with_extra_variance(self, var_q: float, var_u: float) -> StokesSums:
        """Add variance to the ``q`` and ``u`` sums that is not from event counting (e.g. the calibration error of
        a subtracted spurious-modulation map, :meth:`trackfit.analysis.SpuriousMap.sum_variance`)."""
        import dataclasses

        return dataclasses.replace(self, extra_var_q=self.extra_var_q + var_q, extra_var_u=self.extra_var_u + var_u)

    def subtract(self, background: StokesSums, scale: float) -> StokesSums:
        """``self - scale * background`` (means subtract, variances add with ``scale^2``).

        ``scale`` = (area x time of the source region) / (area x time of the background region).
        """
        if not (np.isfinite(scale) and scale >= 0):
            raise ValueError(f"'scale' must be >= 0 (got {scale!r})")
        s2 = scale**2
        return StokesSums(i=self.i - scale * background.i, q=self.q - scale * background.q,
                          u=self.u - scale * background.u, w2=self.w2 + s2 * background.w2,
                          qq=self.qq + s2 * background.qq, uu=self.uu + s2 * background.uu,
                          qu=self.qu + s2 * background.qu, qi=self.qi + s2 * background.qi,
                          ui=self.ui + s2 * background.ui, m2=self.m2 + s2 * background.m2,
                          n_events=self.n_events, n_background=background.n_events, background_scale=scale,
                          extra_var_q=self.extra_var_q + s2 * background.extra_var_q,
                          extra_var_u=self.extra_var_u + s2 * background.extra_var_u)

    def __add__(self, other: StokesSums) -> StokesSums:
        if not isinstance(other, StokesSums):
            return NotImplemented
        keys = ("i", "q", "u", "w2", "qq", "uu", "qu", "qi", "ui", "m2", "n_events", "extra_var_q", "extra_var_u")
        return StokesSums(**{k: getattr(self, k) + getattr(other, k) for k in keys})


def stokes_sums(angles_rad, *, modulation_factor=1.0, weights=None, spurious_q=None,
                spurious_u=None) -> StokesSums:
    """Per-event Stokes contributions summed (see the module docstring for the definitions).

    Parameters
    ----------
    angles_rad : array_like, shape (n,)
        Emission angles; events with a NaN angle, weight or modulation factor are dropped.
    modulation_factor : float or array_like, shape (n,)
        Modulation factor (one value, or per event, e.g. ``curve(energy_kev)``).
    weights : array_like, shape (n,), optional
        Per-event weights (e.g. :func:`ellipticity_weights`); default 1.
    spurious_q, spurious_u : array_like, shape (n,), optional
        Spurious modulation ``<cos 2phi>``, ``<sin 2phi>`` of unpolarized light at each event, subtracted
        before the modulation correction.
    """
    phi = np.asarray(angles_rad, dtype=float).ravel()
    n = phi.size
    mu = _as_events("modulation_factor", modulation_factor, n)
    w = _as_events("weights", weights, n, default=np.ones(n))
    q_sp = _as_events("spurious_q", spurious_q, n, default=np.zeros(n))
    u_sp = _as_events("spurious_u", spurious_u, n, default=np.zeros(n))
    good = np.isfinite(phi) & np.isfinite(mu) & np.isfinite(w) & np.isfinite(q_sp) & np.isfinite(u_sp)
    if np.any(mu[good] <= 0) or np.any(mu[good] > 1):
        raise ValueError(f"'modulation_factor' must be in (0, 1] (got values in [{mu[good].min():g}, "
                         f"{mu[good].max():g}])")
    if np.any(w[good] < 0):
        raise ValueError(f"'weights' must be >= 0 (got a minimum of {w[good].min():g})")
    phi, mu, w, q_sp, u_sp = phi[good], mu[good], w[good], q_sp[good], u_sp[good]
    qk = 2.0 * (np.cos(2 * phi) - q_sp) / mu
    uk = 2.0 * (np.sin(2 * phi) - u_sp) / mu
    w2 = w * w
    return StokesSums(i=float(w.sum()), q=float(w @ qk), u=float(w @ uk), w2=float(w2.sum()),
                      qq=float(w2 @ (qk * qk)), uu=float(w2 @ (uk * uk)), qu=float(w2 @ (qk * uk)),
                      qi=float(w2 @ qk), ui=float(w2 @ uk), m2=float(np.sum(w2 / mu**2)), n_events=int(phi.size))


def rice_interval(degree, sigma, confidence_level: float = ONE_SIGMA_LEVEL) -> tuple[float, float]:
    """Neyman confidence interval for the polarization degree from the Rice distribution of the estimate.

    The estimate ``p_hat = sqrt(Q^2 + U^2)`` of a true degree ``p0`` with per-component error ``sigma`` follows
    a Rice law (docs/methods.md section 4). Acceptance regions: for ``p0 <= p_c`` the one-sided ``[0, x_cl(p0)]``, for
    ``p0 > p_c`` the central ``[x_(a/2)(p0), x_(1-a/2)(p0)]``, with ``p_c = sigma sqrt(-2 ln(1 - cl))`` (the
    detection threshold at that level: MDP99 for cl = 0.99). Coverage is exact for every ``p0``; intervals are
    never empty and become upper limits ``[0, hi]`` for small ``p_hat``.

    Parameters
    ----------
    degree : float
        Measured degree ``p_hat >= 0``.
    sigma : float
        Error of each normalized Stokes parameter (> 0).
    confidence_level : float
        In (0, 1); default 0.6827.

    Returns
    -------
    (low, high) : tuple of float
    """
    if not 0 < confidence_level < 1:
        raise ValueError(f"'confidence_level' must be in (0, 1) (got {confidence_level!r})")
    if not (np.isfinite(sigma) and sigma > 0):
        raise ValueError(f"'sigma' must be > 0 (got {sigma!r})")
    if not (np.isfinite(degree) and degree >= 0):
        raise ValueError(f"'degree' must be >= 0 (got {degree!r})")
    x = degree / sigma
    alpha = 1.0 - confidence_level
    pc = float(np.sqrt(-2.0 * np.log(alpha)))

    def cdf(p0):  # P(p_hat <= observed | p0), decreasing in p0
        return float(stats.rice.cdf(x, p0)) if p0 > 0 else float(-np.expm1(-0.5 * x * x))

    big = x + 20.0

    def root(level, lo, hi):
        return optimize.brentq(lambda p0: cdf(p0) - level, lo, hi, xtol=1e-10)

    f_pc = cdf(pc)
    upper = root(alpha / 2, pc, big) if f_pc >= alpha / 2 else pc
    if cdf(0.0) <= confidence_level:
        lower = 0.0
    elif f_pc <= confidence_level:
        lower = root(confidence_level, 0.0, pc)
    elif f_pc <= 1 - alpha / 2:
        lower = pc
    else:
        lower = root(1 - alpha / 2, pc, big)
    return lower * sigma, upper * sigma


@dataclass(frozen=True, kw_only=True)
class StokesResult:
    """Normalized, modulation-corrected Stokes parameters and the polarization they imply.

    Degrees and MDP are fractions (0 to 1; multiply by 100 for %). Angles are measured in the detector frame from
    +x towards +y, in (-pi/2, pi/2] (``angle_deg`` in (-90, 90]). Formulas: docs/methods.md §4.

    Attributes
    ----------
    q, u : float
        Normalized, modulation-corrected Stokes parameters: their expectations are ``p cos 2psi`` and
        ``p sin 2psi`` for a beam of degree ``p`` and angle ``psi``.
    q_err, u_err, qu_cov : float
        Their errors and covariance (counting statistics, plus the calibration error of a subtracted spurious
        map when there is one).
    degree, degree_err : float
        ``p_hat = sqrt(q^2 + u^2)`` (biased high at low counts: see ``degree_low``/``degree_high``) and its error.
    angle_rad, angle_err_rad : float
        ``psi_hat = atan2(u, q) / 2`` in (-pi/2, pi/2] and its error (NaN when ``degree == 0``); meaningful only
        when :attr:`detected` (the linear error is then valid; below it every angle is compatible).
    angle_deg, angle_err_deg : float
        The same in degrees (read-only properties).
    degree_low, degree_high : float
        Interval for the degree at ``confidence_level`` (:func:`rice_interval`; NaN when no level was asked for).
    confidence_level : float
        Probability content of that interval (default 0.6827, one Gaussian sigma).
    p_value_unpolarized : float
        Probability of a degree >= ``degree`` from unpolarized light, ``exp(-p^2/(2 sigma^2))``.
    mdp99 : float
        Minimum detectable polarization at 99 % for these events (with their weights and background).
    n_events, n_eff : int, float
        Events used and effective events ``(sum w)^2 / sum w^2`` (equal without weights).
    sum_weights : float
        ``I = sum w`` (after background subtraction).
    modulation_factor : float
        Effective modulation factor of the events (``sum w / sqrt(N_eff sum w^2/mu^2)``; the value for which
        ``mdp99 = 4.29 / (modulation_factor sqrt(n_eff))``).
    n_background, background_scale : int, float
        Off-source events subtracted and their scale ``(area x time on) / (area x time off)``.
    label : str
        Free text shown in the printed summary (e.g. the energy band).

    ``to_dict()`` gives all of them as plain values (JSON-ready, angles also in degrees).
    """

    q: float
    u: float
    q_err: float
    u_err: float
    qu_cov: float
    degree: float
    degree_err: float
    angle_rad: float
    angle_err_rad: float
    degree_low: float
    degree_high: float
    confidence_level: float
    p_value_unpolarized: float
    mdp99: float
    n_events: int
    n_eff: float
    sum_weights: float
    modulation_factor: float
    n_background: int = 0
    background_scale: float = 0.0
    label: str = field(default="", compare=False)

    @classmethod
    def from_sums(cls, sums: StokesSums, *, confidence_level: float | None = ONE_SIGMA_LEVEL,
                  label: str = "") -> StokesResult:
        """Evaluate the sums (see the module docstring)."""
        if not sums.i > 0:
            if sums.n_background or sums.background_scale:
                raise ValueError(f"no signal: the sum of weights after background subtraction is {sums.i:g} "
                                 f"({sums.n_events} source events, {sums.n_background} background events scaled "
                                 f"by {sums.background_scale:g})")
            raise ValueError(f"no events to measure: the sum of weights is {sums.i:g} ({sums.n_events} events with an "
                             "emission angle)")
        i = sums.i
        q, u = sums.q / i, sums.u / i
        var_q = max((sums.qq - 2 * q * sums.qi + q * q * sums.w2 + sums.extra_var_q) / i**2, 0.0)
        var_u = max((sums.uu - 2 * u * sums.ui + u * u * sums.w2 + sums.extra_var_u) / i**2, 0.0)
        cov = (sums.qu - q * sums.ui - u * sums.qi + q * u * sums.w2) / i**2
        degree = float(np.hypot(q, u))
        sigma = float(np.sqrt(0.5 * (var_q + var_u)))
        if degree > 0:
            degree_err = float(np.sqrt(max(q * q * var_q + u * u * var_u + 2 * q * u * cov, 0.0)) / degree)
            angle_err = float(np.sqrt(max(u * u * var_q + q * q * var_u - 2 * q * u * cov, 0.0)) / (2 * degree**2))
            angle = 0.5 * float(np.arctan2(u, q))
            if angle <= -np.pi / 2:
                angle += np.pi
        else:
            degree_err, angle, angle_err = sigma, float("nan"), float("nan")
        if sigma > 0:
            p_value = float(np.exp(-0.5 * (degree / sigma) ** 2))
        else:
            p_value = 0.0 if degree > 0 else 1.0
        if confidence_level is None:
            low = high = float("nan")
        elif sigma > 0:
            low, high = rice_interval(degree, sigma, confidence_level)
        else:
            low = high = degree
        n_eff = sums.i**2 / sums.w2
        mdp = MDP99_CONSTANT * float(np.sqrt(sums.m2)) / i
        mu_eff = float(i / np.sqrt(n_eff * sums.m2))
        return cls(q=float(q), u=float(u), q_err=float(np.sqrt(var_q)), u_err=float(np.sqrt(var_u)),
                   qu_cov=float(cov), degree=degree, degree_err=degree_err, angle_rad=angle,
                   angle_err_rad=angle_err, degree_low=float(low), degree_high=float(high),
                   confidence_level=float("nan") if confidence_level is None else float(confidence_level),
                   p_value_unpolarized=p_value, mdp99=float(mdp),
                   n_events=int(sums.n_events), n_eff=float(n_eff), sum_weights=float(i), modulation_factor=mu_eff,
                   n_background=int(sums.n_background), background_scale=float(sums.background_scale), label=label)

    @property
    def detected(self) -> bool:
        """Whether a polarization is detected at 99 % (``p_value_unpolarized < 0.01``); below that the angle is
        undefined: every angle is compatible with the data."""
        return bool(self.p_value_unpolarized < DETECTION_P_VALUE)

    @property
    def angle_deg(self) -> float:
        return float(np.rad2deg(self.angle_rad))

    @property
    def angle_err_deg(self) -> float:
        return float(np.rad2deg(self.angle_err_rad))

    def to_dict(self) -> dict:
        """Plain values (JSON-ready), including the angle in degrees."""
        out = asdict(self)
        out["angle_deg"] = self.angle_deg
        out["angle_err_deg"] = self.angle_err_deg
        out["detected"] = self.detected
        return {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in out.items()}

    def _rows(self):
        pct = 100.0
        cl = f"{100 * self.confidence_level:.4g} %"
        rows = [("Q (normalized)", f"{self.q:+.5f} ± {self.q_err:.5f}"),
                ("U (normalized)", f"{self.u:+.5f} ± {self.u_err:.5f}"),
                ("degree", f"{pct * self.degree:.2f} % ± {pct * self.degree_err:.2f} %"),
                (f"degree {cl} interval", f"[{pct * self.degree_low:.2f} %, {pct * self.degree_high:.2f} %]"),
                ("angle", f"{self.angle_deg:+.2f}° ± {self.angle_err_deg:.2f}°" if self.detected else
                 "undefined: no polarization detected at 99 % (every angle is compatible)"),
                ("MDP99", f"{pct * self.mdp99:.2f} %"),
                ("P(unpolarized)", f"{self.p_value_unpolarized:.3g}"),
                ("events used", f"{self.n_events}")]
        if abs(self.n_eff - self.n_events) > 0.5:
            rows.append(("effective events", f"{self.n_eff:.6g} = (Σw)²/Σw² (weights, background)"))
        rows.append(("modulation factor", f"{self.modulation_factor:.4f} (effective, of the events used)"))
        if self.n_background:
            rows.append(("background", f"{self.n_background} events × {self.background_scale:.4g}"))
        return rows

    def __repr__(self):
        title = "Stokes parameters" + (f" — {self.label}" if self.label else "")
        return title + "\n" + "\n".join(f"  {k:<24}{v}" for k, v in self._rows())

    def _repr_html_(self):
        body = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>" for k, v in self._rows())
        caption = html.escape("Stokes parameters" + (f" — {self.label}" if self.label else ""))
        return f"<table><caption>{caption}</caption>{body}</table>"


def stokes_parameters(angles_rad, *, modulation_factor=1.0, weights=None, spurious_q=None, spurious_u=None,
                      background: StokesSums | None = None, background_scale: float = 1.0,
                      confidence_level: float | None = ONE_SIGMA_LEVEL, label: str = "") -> StokesResult:
    """Normalized, modulation-corrected Stokes parameters of a set of emission angles.

    Parameters
    ----------
    angles_rad : array_like, shape (n,)
        Reconstructed emission angles (NaN entries dropped).
    modulation_factor : float or array_like, shape (n,)
        Modulation factor, one value or per event; with weights it must be the one measured with the same
        weights (Di Marco et al. 2022).
    weights : array_like, shape (n,), optional
        Per-event weights.
    spurious_q, spurious_u : array_like, shape (n,), optional
        Spurious modulation per event (from :class:`trackfit.analysis.SpuriousMap`), subtracted.
    background : StokesSums, optional
        Sums of an off-source selection (:func:`stokes_sums` with the same corrections), subtracted
        after scaling by ``background_scale``.
    confidence_level : float or None
        Level of the Rice interval of the degree (``None``: skip the interval, for fast toy loops).

    Returns
    -------
    StokesResult

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> result = stokes_parameters(rng.uniform(-np.pi, np.pi, 10000), modulation_factor=0.3)
    >>> round(result.mdp99, 4)  # 4.29 / (0.3 sqrt(1e4))
    0.1431
    """
    sums = stokes_sums(angles_rad, modulation_factor=modulation_factor, weights=weights, spurious_q=spurious_q,
                       spurious_u=spurious_u)
    if background is not None:
        sums = sums.subtract(background, background_scale)
    return StokesResult.from_sums(sums, confidence_level=confidence_level, label=label)


@dataclass(frozen=True)
class StokesBands:
    """Stokes results per energy band (``edges_kev[k] <= E < edges_kev[k+1]``)."""

    edges_kev: np.ndarray
    results: tuple[StokesResult | None, ...]

    def to_dict(self) -> dict:
        return {"edges_kev": [float(e) for e in self.edges_kev],
                "bands": [None if r is None else r.to_dict() for r in self.results]}

    def _rows(self):
        rows = []
        for lo, hi, r in zip(self.edges_kev[:-1], self.edges_kev[1:], self.results, strict=True):
            band = f"{lo:g}–{hi:g}"
            if r is None:
                rows.append((band, "0", "-", "-", "-", "-"))
            else:
                angle = f"{r.angle_deg:+.1f} ± {r.angle_err_deg:.1f}" if r.detected else "undefined"
                rows.append((band, f"{r.n_events}", f"{100 * r.degree:.2f} ± {100 * r.degree_err:.2f}", angle,
                             f"{100 * r.mdp99:.2f}", f"{r.modulation_factor:.3f}"))
        return rows

    _HEAD = ("E (keV)", "events", "degree (%)", "angle (°)", "MDP99 (%)", "μ")

    def __repr__(self):
        widths = [max(len(h), *(len(r[k]) for r in self._rows())) + 2 for k, h in enumerate(self._HEAD)]
        lines = ["".join(f"{h:>{w}}" for h, w in zip(self._HEAD, widths, strict=True))]
        lines += ["".join(f"{c:>{w}}" for c, w in zip(r, widths, strict=True)) for r in self._rows()]
        return "\n".join(lines)

    def _repr_html_(self):
        head = "".join(f"<th>{html.escape(h)}</th>" for h in self._HEAD)
        body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>" for r in self._rows())
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def stokes_in_bands(angles_rad, energy_kev, edges_kev, *, modulation_factor=1.0, weights=None,
                    spurious_q=None, spurious_u=None, confidence_level: float = ONE_SIGMA_LEVEL) -> StokesBands:
    """:func:`stokes_parameters` in each energy band; bands with no event give ``None``."""
    phi = np.asarray(angles_rad, dtype=float)
    energy = np.asarray(energy_kev, dtype=float)
    edges = np.asarray(edges_kev, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0):
        raise ValueError(f"'edges_kev' must be increasing with at least 2 entries (got {edges_kev!r})")
    if energy.shape != phi.shape:
        raise ValueError(f"'energy_kev' must have the shape of the angles {phi.shape} (got {energy.shape})")
    n = phi.size
    per_event = {name: _as_events(name, value, n) for name, value in
                 (("modulation_factor", modulation_factor), ("weights", weights), ("spurious_q", spurious_q),
                  ("spurious_u", spurious_u))}
    results = []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        band = (energy >= lo) & (energy < hi) & np.isfinite(phi)
        if not np.any(band):
            results.append(None)
            continue
        kwargs = {k: (None if v is None else v[band]) for k, v in per_event.items()}
        sums = stokes_sums(phi[band], **kwargs)
        results.append(StokesResult.from_sums(sums, confidence_level=confidence_level,
                                              label=f"{lo:g}–{hi:g} keV") if sums.i > 0 else None)
    return StokesBands(edges_kev=edges, results=tuple(results))


def mdp99(n_events=None, *, modulation_factor, rate_src_hz=None, rate_bkg_hz=0.0, exposure_s=None,
          weights=None) -> float:
    """Minimum detectable polarization at 99 % confidence (Weisskopf, Elsner & O'Dell 2010).

    Three ways to call it:

    * ``mdp99(n_events, modulation_factor=mu)`` -> ``4.29193 / (mu sqrt(N))``;
    * ``mdp99(modulation_factor=mu, rate_src_hz=R_S, rate_bkg_hz=R_B, exposure_s=T)`` ->
      ``4.29193 / (mu R_S) sqrt((R_S + R_B) / T)``;
    * ``mdp99(modulation_factor=mu_w, weights=w)`` -> ``4.29193 sqrt(sum w^2) / (mu_w sum w)``
      (Di Marco et al. 2022; ``mu_w`` measured with the same weights).

    Parameters
    ----------
    n_events : int, optional
        Source events (no background).
    modulation_factor : float
        In (0, 1].
    rate_src_hz, rate_bkg_hz, exposure_s : float, optional
        Source and background rates in the selection, and the exposure.
    weights : array_like, optional
        Per-event weights of the source events.

    Examples
    --------
    >>> round(mdp99(10**6, modulation_factor=0.30), 6)
    0.014306
    """
    mu = float(modulation_factor)
    if not 0 < mu <= 1:
        raise ValueError(f"'modulation_factor' must be in (0, 1] (got {modulation_factor!r})")
    given = [n_events is not None, rate_src_hz is not None, weights is not None]
    if sum(given) != 1:
        raise ValueError("give exactly one of n_events, rate_src_hz (with exposure_s) or weights "
                         f"(got n_events={n_events!r}, rate_src_hz={rate_src_hz!r}, "
                         f"weights={'given' if weights is not None else None})")
    if n_events is not None:
        if not n_events > 0:
            raise ValueError(f"'n_events' must be > 0 (got {n_events!r})")
        return MDP99_CONSTANT / (mu * float(np.sqrt(n_events)))
    if weights is not None:
        w = np.asarray(weights, dtype=float)
        if w.size == 0 or np.any(w < 0) or not w.sum() > 0:
            raise ValueError(f"'weights' must be >= 0 with a positive sum (got {w.size} weights)")
        return MDP99_CONSTANT * float(np.sqrt(np.sum(w * w))) / (mu * float(w.sum()))
    if exposure_s is None or not exposure_s > 0:
        raise ValueError(f"'exposure_s' must be > 0 when rates are given (got {exposure_s!r})")
    if not rate_src_hz > 0 or rate_bkg_hz < 0:
        raise ValueError(f"rates must be rate_src_hz > 0 and rate_bkg_hz >= 0 (got {rate_src_hz!r}, "
                         f"{rate_bkg_hz!r})")
    return MDP99_CONSTANT / (mu * rate_src_hz) * float(np.sqrt((rate_src_hz + rate_bkg_hz) / exposure_s))


def ellipticity_weights(m2_major_mm2, m2_minor_mm2, *, exponent: float = 0.75) -> np.ndarray:
    """Per-event weights ``((L - T)/(L + T))^exponent`` from the second moments (Di Marco et al. 2022).

    NaN moments give NaN weights (those events are dropped by the Stokes functions).
    """
    long_ = np.asarray(m2_major_mm2, dtype=float)
    trans = np.asarray(m2_minor_mm2, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        ellipticity = np.clip((long_ - trans) / (long_ + trans), 0.0, 1.0)
    return ellipticity**exponent
