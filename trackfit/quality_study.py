"""The quality-factor study: emission estimates, selections and weights measured against the two-stage analysis.

The sensitivity of a polarimeter scales as MDP ∝ 1 / (μ sqrt(ε N)): what the reconstruction and the analysis can
improve is the quality factor Q = μ sqrt(ε) (docs/methods.md §2, §10), with weights its weighted equivalent
μ_w sqrt(N_eff / N) (Kislat et al. 2015; Di Marco et al. 2022). :func:`run_quality_study` measures it for a list of
:class:`StudyMethod` (an emission estimate, reconstruction settings, a selection and weights) on simulated runs of
one detector design at a set of energies, always with the published two-stage analysis (:data:`REFERENCE`) as the
reference column:

* at each energy it simulates a 100 %-polarized and an unpolarized *measurement* run and, when a method uses the
  weights ``"response"``, a 100 %-polarized *calibration* run with an independent seed for fitting the response
  (:func:`trackfit.design.polarized_beam`); every run is reconstructed once with all the estimates the methods need;
* for each method: ε (kept / triggered events), μ_w and its error (:func:`~trackfit.analysis.measure_modulation_factor`
  projected on the beam angle, the estimator of ``trackfit calibrate``), N_eff = (Σw)²/Σw², Q, the MDP99 for a fixed
  number of photons at the window, the residual modulation of the unpolarized run with the same selection and
  weights, Q / Q_reference with its error from a paired bootstrap over the same events, and — from the simulation
  truth, as scores only — the share of tracks whose direction points away from their true start and the median
  distance of the conversion point from the true one.

Seeds: every run's seed derives from ``seed``, the energy and the run's role, so a study with another ``seed`` is
an independent set of events — tune on one seed, report on another (docs/methods.md §11).

Examples
--------
>>> from trackfit.quality_study import StudyMethod, run_quality_study
>>> study = run_quality_study("hedme-1atm-1cm", [3.7, 5.9], [StudyMethod(name="adaptive", estimator="adaptive")],
...                           n_events=20_000, seed=7)                       # doctest: +SKIP
>>> print(study.to_markdown())                                            # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import html
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .analysis.estimates import with_estimate
from .analysis.modfactor import measure_modulation_factor
from .analysis.polarimetry import WEIGHTINGS
from .analysis.response_weights import fit_modulation_response
from .analysis.selection import Cut, with_default
from .analysis.stokes import MDP99_CONSTANT, ellipticity_weights, stokes_parameters
from .design import polarized_beam
from .recon import ReconConfig, reconstruct
from .recon.config import EMISSION_ESTIMATORS
from .simulate import SimConfig, load_preset, run

__all__ = ["StudyMethod", "REFERENCE", "QualityStudy", "run_quality_study", "METRICS"]

#: the reference column: the published two-stage analysis, default settings and selection, no weights
#: (the name is the one the table shows)
REFERENCE_NAME = "two-stage"

#: the metrics of every (energy, method) row, with their meaning
METRICS = {
    "n_triggered": "triggered events of the polarized measurement run",
    "n_kept": "events kept by the selection (with an angle and a finite weight)",
    "efficiency": "n_kept / n_triggered",
    "efficiency_err": "binomial error",
    "modulation_factor": "weighted modulation factor mu_w of the kept events (projection on the beam angle)",
    "modulation_factor_err": "its error",
    "n_eff": "effective events (sum w)^2 / sum w^2 of the kept events",
    "quality": "Q = mu_w sqrt(n_eff / n_triggered); mu sqrt(efficiency) without weights",
    "quality_err": "bootstrap error of Q",
    "quality_ratio": "Q / Q of the reference method on the same events",
    "quality_ratio_err": "paired bootstrap error of the ratio",
    "mdp99": "MDP99 for n_photons photons at the window (detection and trigger efficiency of the run)",
    "mdp99_ratio": "MDP99 / MDP99 of the reference method (= 1 / quality_ratio)",
    "residual_modulation": "modulation amplitude of the unpolarized run, same selection and weights",
    "residual_err": "error of each normalized Stokes parameter of the unpolarized run",
    "residual_p_value": "probability of an amplitude at least this large without modulation (Rayleigh)",
    "head_correct": "share of kept events whose direction points away from their true start (truth score)",
    "conv_error_mm": "median distance of the conversion point from the true one (truth score)",
}


@dataclass(frozen=True, kw_only=True)
class StudyMethod:
    """One way of reconstructing and analysing events, as compared by :func:`run_quality_study`.

    Parameters
    ----------
    name : str
        Label of the method in tables and figures.
    estimator : {"two-stage", "adaptive", "skeleton"}
        The emission estimate (``ReconConfig.emission_estimator``).
    weights : {"none", "ellipticity", "response"}
        Per-event weights; ``"response"`` is fitted on the calibration run of each energy.
    recon : ReconConfig, optional
        Other reconstruction settings (default ``ReconConfig()``; its ``emission_estimator`` is ignored).
    selection : Cut, optional
        Cuts added to the default selection.
    """

    name: str
    estimator: str = "two-stage"
    weights: str = "none"
    recon: ReconConfig | None = None
    selection: Cut | None = None

    def __post_init__(self):
        if not self.name:
            raise ValueError("a study method needs a name")
        if self.estimator not in EMISSION_ESTIMATORS:
            raise ValueError(f"'estimator' must be one of {EMISSION_ESTIMATORS} (got {self.estimator!r})")
        if self.weights not in WEIGHTINGS:
            raise ValueError(f"'weights' must be one of {WEIGHTINGS} (got {self.weights!r})")

    @property
    def settings_key(self) -> str:
        """The reconstruction settings apart from the estimator (methods sharing them share one reconstruction)."""
        config = self.recon or ReconConfig()
        return dataclasses.replace(config, emission_estimator="two-stage").to_toml()


#: the published two-stage analysis with default settings, selection and no weights
REFERENCE = StudyMethod(name=REFERENCE_NAME)

_ESTIMATOR_RANK = {name: k for k, name in enumerate(EMISSION_ESTIMATORS)}  # a later one's tables hold the earlier


def _seed(seed: int, energy_kev: float, role: int) -> int:
    return int(np.random.SeedSequence([int(seed), int(round(energy_kev * 1e6)), role]).generate_state(1)[0])


@dataclass
class _Run:
    """One simulated, reconstructed run: its tables per settings key, and its efficiencies."""

    tables: dict
    n_converted: int
    detection_efficiency: float


def _simulate(design, energy_kev, n_events, seed, degree, configs, beam_sigma_mm) -> _Run:
    beam = polarized_beam(design, energy_kev, beam_sigma_mm)
    if degree != 1.0:
        beam = beam.with_monochromatic(polarization_degree=degree)
    result = run(beam, n_events, rng=seed)
    tables = {key: reconstruct(result.batch, config, run_info=result.run_info()) for key, config in configs.items()}
    return _Run(tables=tables, n_converted=result.n_converted, detection_efficiency=result.detection_efficiency)


def _weights(method, events, response):
    if method.weights == "ellipticity":
        return ellipticity_weights(events["m2_major_mm2"], events["m2_minor_mm2"])
    if method.weights == "response":
        return response(events)
    return np.ones(len(events["emission_rad"]))


def _kept(method, table, response):
    """(events with the method's estimate, mask of kept events, weights of all events)."""
    events = with_estimate(table, method.estimator)
    mask = with_default(method.selection).mask(events)
    w = np.asarray(_weights(method, events, response), dtype=np.float64)
    phi = np.asarray(events["emission_rad"], dtype=np.float64)
    mask &= np.isfinite(phi) & np.isfinite(w) & (w >= 0)
    return events, mask, w


def _truth_scores(events, mask):
    """Share of kept events whose direction points away from their true start, and the median conversion-point
    error (NaN without truth columns)."""
    needed = ("truth_conversion_x_mm", "truth_conversion_y_mm")
    if not all(name in events for name in needed) or not mask.any():
        return math.nan, math.nan
    get = {name: np.asarray(events[name], dtype=np.float64)[mask] for name in
           ("truth_conversion_x_mm", "truth_conversion_y_mm", "centroid_x_mm", "centroid_y_mm", "axis_rad",
            "emission_rad", "conv_x_mm", "conv_y_mm")}
    ca, sa = np.cos(get["axis_rad"]), np.sin(get["axis_rad"])
    true_side = np.sign((get["truth_conversion_x_mm"] - get["centroid_x_mm"]) * ca
                        + (get["truth_conversion_y_mm"] - get["centroid_y_mm"]) * sa)
    pointing = np.cos(get["emission_rad"] - get["axis_rad"])
    correct = float(np.mean(pointing * true_side < 0))
    error = float(np.median(np.hypot(get["conv_x_mm"] - get["truth_conversion_x_mm"],
                                     get["conv_y_mm"] - get["truth_conversion_y_mm"])))
    return correct, error


def _bootstrap_quality(phi, w, mask, resamples):
    """Q of each bootstrap resample (Poisson weights per triggered event): shape (n_resamples,)."""
    c = np.where(mask, 2.0 * np.cos(2.0 * phi), 0.0)
    wk = np.where(mask, w, 0.0)
    sw = resamples @ wk
    swc = resamples @ (wk * c)
    sw2 = resamples @ (wk * wk)
    n = resamples.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return swc / sw * np.sqrt(sw * sw / sw2 / n)


def _measure(method, pol, unpol, response, n_photons, resamples):
    """The metrics of one method on the measurement runs of one energy (and its bootstrap Q values)."""
    key = method.settings_key
    events, mask, w = _kept(method, pol.tables[key], response)
    n_triggered = len(mask)
    phi = np.asarray(events["emission_rad"], dtype=np.float64)
    n_kept = int(mask.sum())
    row = {"n_triggered": n_triggered, "n_kept": n_kept}
    eff = n_kept / n_triggered if n_triggered else math.nan
    row["efficiency"] = eff
    row["efficiency_err"] = math.sqrt(eff * (1 - eff) / n_triggered) if n_triggered else math.nan
    wk = w[mask]
    if n_kept >= 2 and wk.sum() > 0:
        point = measure_modulation_factor(phi[mask], np.asarray(events["energy_kev"], dtype=float)[mask],
                                          polarization_angle_rad=0.0, weights=wk)
        mu, mu_err = point.value, point.error
        n_eff = float(wk.sum() ** 2 / np.sum(wk * wk))
    else:
        mu = mu_err = n_eff = math.nan
    quality = mu * math.sqrt(n_eff / n_triggered) if n_triggered else math.nan
    row.update(modulation_factor=mu, modulation_factor_err=mu_err, n_eff=n_eff, quality=quality)
    # MDP99 for n_photons at the window: the run's detection and trigger efficiencies give the triggered events
    triggered_per_photon = pol.detection_efficiency * n_triggered / pol.n_converted if pol.n_converted else math.nan
    effective = n_photons * triggered_per_photon * n_eff / n_triggered if n_triggered else math.nan
    row["mdp99"] = MDP99_CONSTANT / (mu * math.sqrt(effective)) if mu > 0 and effective > 0 else math.nan
    # the unpolarized run, same selection and weights
    u_events, u_mask, u_w = _kept(method, unpol.tables[key], response)
    if u_mask.sum() >= 2 and u_w[u_mask].sum() > 0:
        residual = stokes_parameters(np.asarray(u_events["emission_rad"], dtype=float)[u_mask], modulation_factor=1.0,
                                     weights=u_w[u_mask], confidence_level=None)
        # normalized Stokes parameters with mu = 1 are twice <cos 2phi>: the modulation amplitude
        row.update(residual_modulation=residual.degree, residual_err=0.5 * (residual.q_err + residual.u_err),
                   residual_p_value=residual.p_value_unpolarized)
    else:
        row.update(residual_modulation=math.nan, residual_err=math.nan, residual_p_value=math.nan)
    row["head_correct"], row["conv_error_mm"] = _truth_scores(events, mask)
    boot = _bootstrap_quality(phi, w, mask, resamples)
    row["quality_err"] = float(np.nanstd(boot, ddof=1))
    return row, boot


@dataclass
class QualityStudy:
    """The result of :func:`run_quality_study`: one row per (energy, method), the reference first.

    Attributes
    ----------
    design : str
        Description of the detector design.
    energies_kev : tuple of float
    methods : tuple of StudyMethod
        The reference first.
    rows : list of dict
        ``energy_kev``, ``method`` and the :data:`METRICS`.
    settings : dict
        Events per run, seed, photons, bootstrap resamples, beam size.
    tables : dict
        With ``keep_tables=True``: ``(energy_kev, role, settings key) -> EventTable`` of every reconstructed run
        (roles ``"polarized"``, ``"unpolarized"``, ``"calibration"``).
    """

    design: str
    energies_kev: tuple
    methods: tuple
    rows: list
    settings: dict
    tables: dict = field(default_factory=dict, repr=False)

    def row(self, energy_kev: float, method: str) -> dict:
        """The row of one energy and method (by name)."""
        for r in self.rows:
            if r["method"] == method and math.isclose(r["energy_kev"], energy_kev):
                return r
        raise KeyError(f"no row for {method!r} at {energy_kev:g} keV; methods: {[m.name for m in self.methods]}")

    def column(self, metric: str, method: str) -> np.ndarray:
        """One metric of one method at every energy."""
        if metric not in METRICS:
            raise KeyError(f"unknown metric {metric!r}; known: {list(METRICS)}")
        return np.array([self.row(e, method)[metric] for e in self.energies_kev])

    def best_method(self, *, max_residual_sigma: float = 3.0) -> str:
        """The method with the largest geometric mean of Q / Q_reference over the energies, among those whose
        unpolarized residual modulation stays within ``max_residual_sigma`` errors at every energy."""
        best, best_score = REFERENCE_NAME, 0.0
        for method in self.methods:
            ratio = self.column("quality_ratio", method.name)
            residual = self.column("residual_modulation", method.name) / self.column("residual_err", method.name)
            if np.any(~np.isfinite(ratio)) or np.any(residual > max_residual_sigma):
                continue
            score = float(np.exp(np.mean(np.log(ratio))))
            if score > best_score:
                best, best_score = method.name, score
        return best

    def to_dict(self) -> dict:
        def plain(v):
            return None if isinstance(v, float) and not math.isfinite(v) else v

        return {"design": self.design, "energies_kev": list(self.energies_kev), "settings": self.settings,
                "methods": [{"name": m.name, "estimator": m.estimator, "weights": m.weights,
                             "selection": None if m.selection is None else m.selection.to_dict()}
                            for m in self.methods],
                "rows": [{k: plain(v) for k, v in r.items()} for r in self.rows]}

    # ------------------------------------------------------------------ display
    def _cells(self, r) -> list[str]:
        def pm(value, error, digits=3):
            return "—" if not math.isfinite(value) else f"{value:.{digits}f} ± {error:.{digits}f}"

        return [f"{r['energy_kev']:g}", r["method"], pm(r["modulation_factor"], r["modulation_factor_err"]),
                f"{r['efficiency']:.3f}", f"{r['n_eff'] / r['n_triggered']:.3f}", pm(r["quality"], r["quality_err"]),
                pm(r["quality_ratio"], r["quality_ratio_err"]), f"{r['mdp99_ratio']:.3f}",
                f"{r['residual_modulation']:.4f} ({r['residual_modulation'] / r['residual_err']:.1f}σ)",
                f"{r['head_correct']:.3f}"]

    _HEADER = ("E (keV)", "method", "μ", "ε", "N_eff/N", "Q", "Q / Q_ref", "MDP ratio", "residual (unpol.)",
               "head right")

    def to_markdown(self) -> str:
        """The table of every energy and method (Q ratios with their paired-bootstrap errors)."""
        lines = ["| " + " | ".join(self._HEADER) + " |", "|" + "---|" * len(self._HEADER)]
        lines += ["| " + " | ".join(self._cells(r)) + " |" for r in self.rows]
        return "\n".join(lines)

    def __repr__(self):
        return (f"QualityStudy({self.design!r}, {len(self.energies_kev)} energies, {len(self.methods)} methods, "
                f"{self.settings.get('n_events')} events per run, seed {self.settings.get('seed')})\n"
                + self.to_markdown())

    def _repr_html_(self):
        head = "".join(f"<th>{html.escape(h)}</th>" for h in self._HEADER)
        body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in self._cells(r)) + "</tr>"
                       for r in self.rows)
        return f"<table><caption>{html.escape(self.design)}</caption><tr>{head}</tr>{body}</table>"

    def plot(self):
        """Q / Q_reference, μ, N_eff / N and the residual modulation (in errors) versus energy, one line per method.

        Returns
        -------
        matplotlib Figure
        """
        import matplotlib.pyplot as plt

        panels = [("quality_ratio", "Q / Q (two-stage)"), ("modulation_factor", "modulation factor μ_w"),
                  ("n_eff_share", "N_eff / N triggered"), ("residual_sigma", "residual modulation / error")]
        fig, axes = plt.subplots(2, 2, figsize=(10, 7.5), sharex=True, layout="constrained")
        energies = np.asarray(self.energies_kev)
        for method in self.methods:
            values = {
                "quality_ratio": (self.column("quality_ratio", method.name),
                                  self.column("quality_ratio_err", method.name)),
                "modulation_factor": (self.column("modulation_factor", method.name),
                                      self.column("modulation_factor_err", method.name)),
                "n_eff_share": (self.column("n_eff", method.name) / self.column("n_triggered", method.name), None),
                "residual_sigma": (self.column("residual_modulation", method.name)
                                   / self.column("residual_err", method.name), None),
            }
            for ax, (key, _) in zip(axes.flat, panels, strict=True):
                y, err = values[key]
                ax.errorbar(energies, y, yerr=err, marker="o", ms=4, capsize=2, label=method.name)
        for ax, (key, label) in zip(axes.flat, panels, strict=True):
            ax.set_ylabel(label)
            ax.grid(alpha=0.3)
            if key == "quality_ratio":
                ax.axhline(1.0, color="0.5", lw=0.8)
                ax.axhline(1.15, color="0.5", lw=0.8, ls=":")
            if key == "residual_sigma":
                ax.axhline(3.0, color="0.5", lw=0.8, ls=":")
        for ax in axes[1]:
            ax.set_xlabel("photon energy [keV]")
        axes[0, 0].legend(fontsize="small")
        fig.suptitle(self.design, fontsize="medium")
        return fig


def run_quality_study(design, energies_kev: Sequence[float], methods: Sequence[StudyMethod] = (), *,
                      n_events: int = 30_000, n_calibration_events: int | None = None, seed: int = 0,
                      n_photons: float = 1e6, bootstrap: int = 200, beam_sigma_mm: float = 0.5,
                      keep_tables: bool = False, progress: bool = False) -> QualityStudy:
    """Measure the quality factor of each method against the two-stage reference (see the module docstring).

    Parameters
    ----------
    design : SimConfig or str
        The detector design, or the name of a simulator preset.
    energies_kev : sequence of float
    methods : sequence of StudyMethod
        Compared with :data:`REFERENCE`, which is always the first column (a method of that name is refused).
    n_events : int
        Triggered events of each measurement run (polarized and unpolarized).
    n_calibration_events : int, optional
        Triggered events of the calibration run that the ``"response"`` weights are fitted on (default
        ``n_events``).
    seed : int
        Seed of the study; every run's seed derives from it, the energy and the run's role.
    n_photons : float
        Photons at the window for the quoted MDP99.
    bootstrap : int
        Poisson-bootstrap resamples for the errors of Q and of the ratios (paired: the same resamples for every
        method).
    beam_sigma_mm : float
        Gaussian beam spot at the chip centre.
    keep_tables : bool
        Keep every reconstructed table in :attr:`QualityStudy.tables`.
    progress : bool
        Print one line per energy.

    Returns
    -------
    QualityStudy
    """
    if isinstance(design, str):
        name = design
        design = load_preset(design)
    else:
        name = design.description
    if not isinstance(design, SimConfig):
        raise TypeError(f"'design' must be a SimConfig or a preset name (got {type(design).__name__})")
    if any(m.name == REFERENCE_NAME for m in methods):
        raise ValueError(f"the method name {REFERENCE_NAME!r} is the reference's; name yours otherwise")
    names = [m.name for m in methods]
    if len(set(names)) != len(names):
        raise ValueError(f"method names must differ (got {names})")
    if int(n_events) < 2 or int(bootstrap) < 2:
        raise ValueError(f"'n_events' and 'bootstrap' must be >= 2 (got {n_events}, {bootstrap})")
    methods = (REFERENCE, *methods)
    n_calibration_events = int(n_events if n_calibration_events is None else n_calibration_events)
    # one reconstruction per settings key, with the most inclusive estimator any method of that key needs
    configs = {}
    for method in methods:
        key = method.settings_key
        config = dataclasses.replace(method.recon or ReconConfig(), emission_estimator=method.estimator)
        if key not in configs or _ESTIMATOR_RANK[method.estimator] > _ESTIMATOR_RANK[
                configs[key].emission_estimator]:
            configs[key] = config
    need_calibration = any(m.weights == "response" for m in methods)
    rows, tables = [], {}
    for energy in (float(e) for e in energies_kev):
        pol = _simulate(design, energy, int(n_events), _seed(seed, energy, 0), 1.0, configs, beam_sigma_mm)
        unpol = _simulate(design, energy, int(n_events), _seed(seed, energy, 1), 0.0, configs, beam_sigma_mm)
        cal = (_simulate(design, energy, n_calibration_events, _seed(seed, energy, 2), 1.0, configs, beam_sigma_mm)
               if need_calibration else None)
        if keep_tables:
            for role, one in (("polarized", pol), ("unpolarized", unpol), ("calibration", cal)):
                if one is not None:
                    tables.update({(energy, role, key): t for key, t in one.tables.items()})
        n_triggered = len(next(iter(pol.tables.values())))
        resampler = np.random.default_rng(_seed(seed, energy, 3))
        resamples = resampler.poisson(1.0, (int(bootstrap), n_triggered)).astype(np.float64)
        boots = {}
        for method in methods:
            response = None
            if method.weights == "response":
                events, mask, _ = _kept(dataclasses.replace(method, weights="none"), cal.tables[method.settings_key],
                                        None)
                selected = {k: np.asarray(v)[mask] for k, v in events.items()}
                response = fit_modulation_response([(selected, selected["emission_rad"], 1.0, 0.0)])
            row, boots[method.name] = _measure(method, pol, unpol, response, n_photons, resamples)
            rows.append({"energy_kev": energy, "method": method.name, **row})
        reference = rows[-len(methods)]
        for k, method in enumerate(methods):
            row = rows[len(rows) - len(methods) + k]
            row["quality_ratio"] = row["quality"] / reference["quality"]
            with np.errstate(invalid="ignore", divide="ignore"):
                row["quality_ratio_err"] = float(np.nanstd(boots[method.name] / boots[REFERENCE_NAME], ddof=1))
            row["mdp99_ratio"] = row["mdp99"] / reference["mdp99"]
        if progress:
            done = rows[-len(methods):]
            print(f"{name} {energy:g} keV: " + ", ".join(f"{r['method']} Q/Q_ref {r['quality_ratio']:.3f}"
                                                           for r in done), flush=True)
    settings = {"n_events": int(n_events), "n_calibration_events": n_calibration_events, "seed": int(seed),
                "n_photons": float(n_photons), "bootstrap": int(bootstrap), "beam_sigma_mm": float(beam_sigma_mm)}
    return QualityStudy(design=name, energies_kev=tuple(float(e) for e in energies_kev), methods=methods, rows=rows,
                        settings=settings, tables=tables)
