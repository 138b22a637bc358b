"""Per-event modulation response from the track shape: the weights ``--weights response`` (``docs/methods.md`` §11).

For weak polarization the weights that minimise the MDP are each event's expected modulation response μ_k
(Marshall 2021; Peirson & Romani 2021; docs/methods.md §4). No single shape number is μ_k, but μ_k is the
conditional mean of ``2 cos 2(φ_k − ψ) / p`` for a beam of degree p and angle ψ; :func:`fit_modulation_response`
estimates it from polarized calibration runs as a least-squares polynomial of degree 2 in five standardised shape
features of the two-stage moments (available for every estimate):

============================  ==================================================================================
``ellipticity``               (m2_major − m2_minor) / (m2_major + m2_minor)
``skewness``                  |m3_major_mm3| / m2_major_mm2^1.5 (how clearly the track has a head and a tail)
``rms_length_mm``             sqrt(m2_major_mm2)
``rms_width_mm``              sqrt(m2_minor_mm2) (diffusion: tracks converted far from the multiplier are wider)
``log_energy_kev``            ln(energy_kev)
============================  ==================================================================================

Features are clipped to the range of the calibration events (0.1 % to 99.9 % quantiles) before the polynomial, and
the response to [0, 1]: an event the model expects nothing from gets weight 0. The model belongs to one estimate and
one selection; it is stored in the calibration file (part ``modulation_response``) and turned into the column
``response_weight`` by :meth:`trackfit.analysis.Calibration.apply`.

Examples
--------
>>> import numpy as np
>>> rng = np.random.default_rng(1)
>>> n = 20000
>>> table = {"m2_major_mm2": rng.uniform(0.002, 0.02, n), "m2_minor_mm2": np.full(n, 0.002),
...          "m3_major_mm3": rng.normal(0, 1e-4, n), "energy_kev": np.full(n, 5.9)}
>>> mu = 0.8 * ellipticity(table)                              # a toy response growing with the ellipticity
>>> phi = toy_angles(mu, rng)
>>> model = fit_modulation_response([(table, phi, 1.0, 0.0)])
>>> bool(np.corrcoef(model(table), mu)[0, 1] > 0.95)
True
"""

from __future__ import annotations

import html
import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["RESPONSE_FEATURES", "ModulationResponse", "fit_modulation_response", "response_features", "ellipticity",
           "toy_angles"]

RESPONSE_FEATURES = ("ellipticity", "skewness", "rms_length_mm", "rms_width_mm", "log_energy_kev")
#: columns the features are computed from
FEATURE_COLUMNS = ("m2_major_mm2", "m2_minor_mm2", "m3_major_mm3", "energy_kev")
_CLIP_QUANTILES = (0.001, 0.999)


def ellipticity(table: Mapping) -> np.ndarray:
    """(m2_major − m2_minor) / (m2_major + m2_minor) of each event (NaN where undefined)."""
    major = np.asarray(table["m2_major_mm2"], dtype=float)
    minor = np.asarray(table["m2_minor_mm2"], dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (major - minor) / (major + minor)


def response_features(table: Mapping) -> np.ndarray:
    """The :data:`RESPONSE_FEATURES` of every event, shape (n, 5); NaN where a feature is undefined.

    Raises
    ------
    KeyError
        A column of :data:`FEATURE_COLUMNS` is missing (the message names it).
    """
    missing = [c for c in FEATURE_COLUMNS if c not in table]
    if missing:
        raise KeyError(f"the modulation response needs column '{missing[0]}' (the table has {sorted(table)})")
    major = np.asarray(table["m2_major_mm2"], dtype=float)
    minor = np.asarray(table["m2_minor_mm2"], dtype=float)
    third = np.asarray(table["m3_major_mm3"], dtype=float)
    energy = np.asarray(table["energy_kev"], dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        features = np.column_stack([ellipticity(table), np.abs(third) / major**1.5, np.sqrt(major), np.sqrt(minor),
                                    np.log(np.where(energy > 0, energy, np.nan))])
    features[~np.isfinite(features)] = np.nan
    return features


def _basis(z: np.ndarray, degree: int) -> np.ndarray:
    """All monomials of the columns of ``z`` up to ``degree`` (constant first)."""
    columns = [np.ones(len(z))]
    for d in range(1, degree + 1):
        for combo in itertools.combinations_with_replacement(range(z.shape[1]), d):
            columns.append(np.prod(z[:, list(combo)], axis=1))
    return np.column_stack(columns)


@dataclass(frozen=True, kw_only=True)
class ModulationResponse:
    """Expected modulation response of an event from its shape: ``clip(P(z), 0, 1)``, ``z`` the standardised,
    clipped :data:`RESPONSE_FEATURES` and ``P`` a polynomial.

    Attributes
    ----------
    coefficients : tuple of float
        Polynomial coefficients, monomials in the order of ``itertools.combinations_with_replacement`` by degree
        (constant first).
    degree : int
    feature_low, feature_high : tuple of float
        Clipping range of each feature.
    feature_mean, feature_scale : tuple of float
        Standardisation ``z = (clip(x) − mean) / scale``.
    n_events : int
        Calibration events the model was fitted on.
    """

    coefficients: tuple[float, ...]
    degree: int
    feature_low: tuple[float, ...]
    feature_high: tuple[float, ...]
    feature_mean: tuple[float, ...]
    feature_scale: tuple[float, ...]
    n_events: int = 0
    features: tuple[str, ...] = RESPONSE_FEATURES

    def __post_init__(self):
        if tuple(self.features) != RESPONSE_FEATURES:
            raise ValueError(f"features must be {RESPONSE_FEATURES} (got {tuple(self.features)})")
        k = len(RESPONSE_FEATURES)
        for name in ("feature_low", "feature_high", "feature_mean", "feature_scale"):
            values = tuple(float(v) for v in getattr(self, name))
            if len(values) != k or not all(math.isfinite(v) for v in values):
                raise ValueError(f"'{name}' must hold {k} finite numbers (got {getattr(self, name)})")
            object.__setattr__(self, name, values)
        if any(s <= 0 for s in self.feature_scale):
            raise ValueError(f"'feature_scale' must be > 0 (got {self.feature_scale})")
        expected = math.comb(k + int(self.degree), k)
        if len(self.coefficients) != expected:
            raise ValueError(f"a polynomial of degree {self.degree} in {k} features has {expected} coefficients "
                             f"(got {len(self.coefficients)})")
        object.__setattr__(self, "coefficients", tuple(float(c) for c in self.coefficients))
        object.__setattr__(self, "degree", int(self.degree))
        object.__setattr__(self, "features", tuple(self.features))

    def _standardised(self, features: np.ndarray) -> np.ndarray:
        clipped = np.clip(features, self.feature_low, self.feature_high)
        return (clipped - np.asarray(self.feature_mean)) / np.asarray(self.feature_scale)

    def __call__(self, table: Mapping) -> np.ndarray:
        """Expected modulation response of each event, in [0, 1] (NaN where a feature is undefined)."""
        features = response_features(table)
        good = np.all(np.isfinite(features), axis=1)
        out = np.full(len(features), np.nan)
        if good.any():
            value = _basis(self._standardised(features[good]), self.degree) @ np.asarray(self.coefficients)
            out[good] = np.clip(value, 0.0, 1.0)
        return out

    def __repr__(self):
        return (f"ModulationResponse: polynomial of degree {self.degree} in {', '.join(self.features)} "
                f"({len(self.coefficients)} coefficients, fitted on {self.n_events} events)")

    def _repr_html_(self):
        return f"<pre>{html.escape(repr(self))}</pre>"


def toy_angles(mu, rng) -> np.ndarray:
    """Emission angles drawn from ``1 + mu cos 2φ`` (beam along +x), one per value of ``mu`` (for examples and
    tests; rejection sampling)."""
    mu = np.asarray(mu, dtype=float)
    phi = rng.uniform(-np.pi, np.pi, mu.size)
    todo = rng.uniform(0, 2, mu.size) > 1 + mu * np.cos(2 * phi)
    while todo.any():
        phi[todo] = rng.uniform(-np.pi, np.pi, int(todo.sum()))
        todo[todo] = rng.uniform(0, 2, int(todo.sum())) > 1 + mu[todo] * np.cos(2 * phi[todo])
    return phi


def fit_modulation_response(runs: Sequence, *, degree: int = 2) -> ModulationResponse:
    """Fit the expected modulation response to polarized calibration events.

    Parameters
    ----------
    runs : sequence of (table, angles_rad, polarization_degree, polarization_angle_rad)
        Selected events of each polarized run: a mapping with the :data:`FEATURE_COLUMNS`, their emission angles
        (the estimate the response is for), the beam's degree in (0, 1] and its angle (None: measured from the
        run's own Stokes parameters).
    degree : int
        Degree of the polynomial (default 2: 21 coefficients).

    Returns
    -------
    ModulationResponse

    Raises
    ------
    ValueError
        Fewer events than ten times the number of coefficients, or a bad degree.
    """
    if int(degree) < 0:
        raise ValueError(f"'degree' must be >= 0 (got {degree})")
    features, targets = [], []
    for table, angles, p, psi in runs:
        phi = np.asarray(angles, dtype=float)
        if not 0 < float(p) <= 1:
            raise ValueError(f"the polarization degree of a calibration run must be in (0, 1] (got {p})")
        f = response_features(table)
        good = np.isfinite(phi) & np.all(np.isfinite(f), axis=1)
        if psi is None:  # the beam angle from the run's own Stokes parameters
            psi = 0.5 * math.atan2(np.sin(2 * phi[good]).sum(), np.cos(2 * phi[good]).sum())
        features.append(f[good])
        targets.append(2.0 * np.cos(2.0 * (phi[good] - psi)) / float(p))
    x = np.concatenate(features) if features else np.zeros((0, len(RESPONSE_FEATURES)))
    y = np.concatenate(targets) if targets else np.zeros(0)
    n_coefficients = math.comb(len(RESPONSE_FEATURES) + int(degree), len(RESPONSE_FEATURES))
    if len(y) < 10 * n_coefficients:
        raise ValueError(f"fitting the modulation response needs at least {10 * n_coefficients} selected polarized "
                         f"events with an angle and a shape (got {len(y)})")
    low, high = np.quantile(x, _CLIP_QUANTILES, axis=0)
    high = np.where(high > low, high, low + 1e-12)
    clipped = np.clip(x, low, high)
    mean, scale = clipped.mean(axis=0), clipped.std(axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    basis = _basis((clipped - mean) / scale, int(degree))
    coefficients = np.linalg.lstsq(basis, y, rcond=None)[0]
    return ModulationResponse(coefficients=tuple(coefficients), degree=int(degree), feature_low=tuple(low),
                              feature_high=tuple(high), feature_mean=tuple(mean), feature_scale=tuple(scale),
                              n_events=int(len(y)))
