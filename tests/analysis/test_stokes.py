"""Unbinned Stokes analysis, MDP, Rice intervals and weights (docs/methods.md sections 3-4 and 9)."""

import numpy as np
import pytest
from scipy import stats

from trackfit.analysis import (
    MDP99_CONSTANT,
    ellipticity_weights,
    mdp99,
    rice_interval,
    stokes_in_bands,
    stokes_parameters,
    stokes_sums,
)

from .toys import modulated_angles


# ------------------------------------------------------------------------------------------------------ MDP
def test_mdp_constant():
    # docs/methods.md section 9 [derived; Weisskopf et al. 2010]: sqrt(-2 ln 0.01) sqrt(2) = 4.29193 (tol 1e-5)
    assert MDP99_CONSTANT == pytest.approx(4.29193, abs=1e-5)


def test_mdp_from_counts():
    # docs/methods.md section 9 [derived]: N = 1e6, mu = 0.30, no background -> 0.014306 (tol 1e-6)
    assert mdp99(10**6, modulation_factor=0.30) == pytest.approx(0.014306, abs=1e-6)


def test_mdp_from_rates():
    # docs/methods.md section 9 [derived]: R_S = 1/s, R_B = 0.1/s, T = 1e5 s, mu = 0.30 -> 0.047428 with the
    # rounded constant 4.29 of Weisskopf et al. 2010 (tol 1e-5); we use 4.29193, so rescale
    value = mdp99(modulation_factor=0.30, rate_src_hz=1.0, rate_bkg_hz=0.1, exposure_s=1e5)
    assert value * 4.29 / MDP99_CONSTANT == pytest.approx(0.047428, abs=1e-5)


def test_mdp_weighted_matches_di_marco_formula():
    # Di Marco et al. 2022: MDP99_w = 4.29 sqrt(sum w^2) / (mu_w sum w); equal weights give 4.29/(mu sqrt(N))
    rng = np.random.default_rng(1)
    w = rng.uniform(0.2, 1.0, 5000)
    assert mdp99(modulation_factor=0.4, weights=w) == pytest.approx(
        MDP99_CONSTANT * np.sqrt(np.sum(w**2)) / (0.4 * w.sum()), rel=1e-12)
    assert mdp99(modulation_factor=0.4, weights=np.full(5000, 0.7)) == pytest.approx(
        mdp99(5000, modulation_factor=0.4), rel=1e-12)


def test_mdp_rejects_ambiguous_input():
    with pytest.raises(ValueError, match="exactly one"):
        mdp99(100, modulation_factor=0.3, rate_src_hz=1.0, exposure_s=10.0)
    with pytest.raises(ValueError, match="modulation_factor"):
        mdp99(100, modulation_factor=0.0)


def test_result_mdp_equals_formula():
    # the MDP99 printed with a result equals 4.29193/(mu sqrt(N)) for one mu and no weights (Weisskopf et al. 2010)
    rng = np.random.default_rng(2)
    result = stokes_parameters(rng.uniform(-np.pi, np.pi, 40000), modulation_factor=0.35)
    assert result.mdp99 == pytest.approx(mdp99(40000, modulation_factor=0.35), rel=1e-12)


# ------------------------------------------------------------------------------------------------------ errors
@pytest.mark.parametrize("p, mu", [(0.0, 0.30), (0.5, 0.30), (0.9, 0.6)])
def test_errors_follow_kislat_formula(p, mu):
    # Kislat et al. 2015: sigma(Q) = sqrt((2 - Q^2 mu^2) / ((N - 1) mu^2)); ours is the compound-Poisson
    # variance, equal up to N vs N - 1 and sampling noise of order 1/sqrt(N)
    rng = np.random.default_rng(3)
    n = 100_000
    result = stokes_parameters(modulated_angles(rng, n, mu * p, 0.3), modulation_factor=mu)
    for value, err in ((result.q, result.q_err), (result.u, result.u_err)):
        expected = np.sqrt((2 - value**2 * mu**2) / ((n - 1) * mu**2))
        assert err == pytest.approx(expected, rel=0.01)


def test_sigma_q_toy_small_sets():
    # Kislat et al. 2015: sigma(Q) = sqrt(2 / ((N - 1) mu^2)) at p = 0; 4000 toy sets of 2000 events
    # (relative error of the spread 1.1 %), tolerance 5 % as in docs/methods.md section 9
    rng = np.random.default_rng(4)
    n_sets, n, mu = 4000, 2000, 0.30
    qs = np.array([stokes_sums(rng.uniform(-np.pi, np.pi, n), modulation_factor=mu).q / n for _ in range(n_sets)])
    assert np.std(qs, ddof=1) == pytest.approx(np.sqrt(2 / ((n - 1) * mu**2)), rel=0.05)


@pytest.mark.slow
def test_sigma_q_toy_at_zero_polarization():
    # docs/methods.md section 9 [Kislat et al. 2015]: sigma(Q) at p = 0, N = 1e5, mu = 0.30 is 0.014907 (5 %, toy MC).
    # 1000 toy sets of uniform angles: the spread of Q estimates has a relative error 1/sqrt(2000) = 2.2 %.
    rng = np.random.default_rng(4)
    n_sets, n = 1000, 100_000
    qs = np.empty(n_sets)
    for k in range(n_sets):
        qs[k] = stokes_sums(rng.uniform(-np.pi, np.pi, n), modulation_factor=0.30).q / n
    print(f"sigma(Q) toy, N = 1e5, mu = 0.3: {np.std(qs, ddof=1):.6f}")
    assert np.std(qs, ddof=1) == pytest.approx(0.014907, rel=0.05)


def test_fraction_above_mdp_for_unpolarized_sets():
    # docs/methods.md section 9 [derived]: the fraction of unpolarized data sets with p_hat > MDP99 is 0.0100
    # (+-0.002 for 1e5 sets); here 2e4 sets of 200 events (binomial sigma 0.0007)
    rng = np.random.default_rng(5)
    n_sets, n, mu = 20_000, 200, 0.5
    phi = rng.uniform(-np.pi, np.pi, (n_sets, n))
    above = 0
    threshold = mdp99(n, modulation_factor=mu)
    for row in phi:
        above += stokes_parameters(row, modulation_factor=mu, confidence_level=None).degree > threshold
    assert above / n_sets == pytest.approx(0.0100, abs=0.002)


# ------------------------------------------------------------------------------------------------------ estimates
@pytest.mark.parametrize("p", [0.1, 0.2, 0.5, 0.8, 1.0])
def test_stokes_unbiased_and_errors_cover(p):
    # toy study: unbiased for p = 0.1-1 and 1-sigma error bars cover the truth 68 +- 2 % of the time
    # (Gaussian 1-sigma content 0.6827; 8000 sets -> binomial sigma 0.52 %, so +-2 % is a 3.8 sigma band)
    rng = np.random.default_rng(100 + int(100 * p))
    mu, psi, n, n_sets = 0.35, np.deg2rad(-40.0), 1000, 8000
    q_true, u_true = p * np.cos(2 * psi), p * np.sin(2 * psi)
    phi = modulated_angles(rng, n * n_sets, mu * p, psi).reshape(n_sets, n)
    results = [stokes_parameters(row, modulation_factor=mu, confidence_level=None) for row in phi]
    q, u = np.array([r.q for r in results]), np.array([r.u for r in results])
    qe, ue = np.array([r.q_err for r in results]), np.array([r.u_err for r in results])
    assert abs(q.mean() - q_true) < 4 * q.std() / np.sqrt(n_sets)
    assert abs(u.mean() - u_true) < 4 * u.std() / np.sqrt(n_sets)
    coverage = (np.mean(np.abs(q - q_true) < qe), np.mean(np.abs(u - u_true) < ue))
    print(f"p={p}: bias Q {q.mean() - q_true:+.5f} ± {q.std() / np.sqrt(n_sets):.5f}, "
          f"U {u.mean() - u_true:+.5f} ± {u.std() / np.sqrt(n_sets):.5f}; coverage {coverage[0]:.4f}, "
          f"{coverage[1]:.4f}")
    for cover in coverage:
        assert cover == pytest.approx(0.6827, abs=0.02)


def test_angle_and_degree_of_strong_polarization():
    # modulation curve of docs/methods.md section 3: p = m / mu and psi = phi0; errors sigma_psi ~ sigma_p / (2 p)
    rng = np.random.default_rng(7)
    result = stokes_parameters(modulated_angles(rng, 200_000, 0.3 * 0.8, np.deg2rad(60.0)), modulation_factor=0.3)
    assert abs(result.degree - 0.8) < 4 * result.degree_err
    assert abs(result.angle_deg - 60.0) < 4 * result.angle_err_deg
    assert result.angle_err_rad == pytest.approx(result.degree_err / (2 * result.degree), rel=0.05)
    assert result.degree_low < result.degree < result.degree_high


def test_angle_range_is_half_open():
    rng = np.random.default_rng(8)
    for angle_deg in (-89.0, 0.0, 89.0):
        r = stokes_parameters(modulated_angles(rng, 50_000, 0.5, np.deg2rad(angle_deg)), modulation_factor=0.5)
        assert -np.pi / 2 < r.angle_rad <= np.pi / 2
        diff = (r.angle_deg - angle_deg + 90) % 180 - 90
        assert abs(diff) < 4 * r.angle_err_deg


def test_per_event_modulation_factor():
    # events with two different modulation factors: Q_k = 2 q_k / mu_k stays unbiased (Kislat et al. 2015 per event)
    rng = np.random.default_rng(9)
    p, psi = 0.6, np.deg2rad(10.0)
    mu = np.where(rng.random(200_000) < 0.5, 0.2, 0.5)
    phi = modulated_angles(rng, mu.size, mu * p, psi)
    r = stokes_parameters(phi, modulation_factor=mu)
    assert abs(r.q - p * np.cos(2 * psi)) < 4 * r.q_err
    assert abs(r.u - p * np.sin(2 * psi)) < 4 * r.u_err
    same = stokes_parameters(phi, modulation_factor=np.full(mu.size, 0.35))
    assert same.q == pytest.approx(stokes_parameters(phi, modulation_factor=0.35).q, rel=1e-12)


def test_background_subtraction_recovers_source():
    # Kislat et al. 2015: background subtraction is additive, Q_src = Q_on - r Q_off, variances add
    rng = np.random.default_rng(10)
    mu, p_src, psi_src = 0.4, 0.5, np.deg2rad(30.0)
    n_src, n_bkg_on, ratio = 60_000, 40_000, 0.25  # background region 4 times the source area
    bkg_pol = (0.3, np.deg2rad(-50.0))  # a polarized background, to make the subtraction matter
    on = np.concatenate([modulated_angles(rng, n_src, mu * p_src, psi_src),
                         modulated_angles(rng, n_bkg_on, mu * bkg_pol[0], bkg_pol[1])])
    off = modulated_angles(rng, int(n_bkg_on / ratio), mu * bkg_pol[0], bkg_pol[1])
    background = stokes_sums(off, modulation_factor=mu)
    r = stokes_parameters(on, modulation_factor=mu, background=background, background_scale=ratio)
    assert abs(r.q - p_src * np.cos(2 * psi_src)) < 4 * r.q_err
    assert abs(r.u - p_src * np.sin(2 * psi_src)) < 4 * r.u_err
    raw = stokes_parameters(on, modulation_factor=mu)
    assert r.q_err > raw.q_err  # the subtraction adds variance
    assert r.n_background == off.size
    # MDP with background (Weisskopf et al. 2010): 4.29 sqrt(N_on + r^2 N_off) / (mu (N_on - r N_off))
    expected = MDP99_CONSTANT * np.sqrt(on.size + ratio**2 * off.size) / (mu * (on.size - ratio * off.size))
    assert r.mdp99 == pytest.approx(expected, rel=1e-9)


def test_weights_and_effective_counts():
    # Di Marco et al. 2022: I_w = sum w, N_eff = (sum w)^2 / sum w^2, mu_w measured with the same weights
    rng = np.random.default_rng(11)
    n = 300_000
    quality = rng.uniform(0, 1, n)
    mu_k = 0.1 + 0.6 * quality  # better tracks modulate more
    p, psi = 0.5, np.deg2rad(-20.0)
    phi = modulated_angles(rng, n, mu_k * p, psi)
    w = quality
    mu_w = np.sum(w * mu_k) / np.sum(w)  # what a weighted calibration run with p = 1 would measure
    r = stokes_parameters(phi, modulation_factor=mu_w, weights=w)
    assert r.n_eff == pytest.approx(w.sum() ** 2 / np.sum(w**2), rel=1e-12)
    assert abs(r.degree - p) < 4 * r.degree_err
    unweighted = stokes_parameters(phi, modulation_factor=np.mean(mu_k))
    assert r.mdp99 < unweighted.mdp99  # weighting by the response improves sensitivity (Marshall 2021)


def test_ellipticity_weights_formula():
    # Di Marco et al. 2022: w = ((L - T)/(L + T))^0.75
    long_, trans = np.array([2.0, 1.0, 3.0, np.nan]), np.array([1.0, 1.0, 0.0, 1.0])
    w = ellipticity_weights(long_, trans)
    assert w[:3] == pytest.approx([(1 / 3) ** 0.75, 0.0, 1.0])
    assert np.isnan(w[3])


def test_nan_angles_dropped_and_bad_inputs_rejected():
    phi = np.array([0.1, np.nan, 0.3, -1.0])
    assert stokes_parameters(phi).n_events == 3
    with pytest.raises(ValueError, match="modulation_factor"):
        stokes_parameters(phi, modulation_factor=1.5)
    with pytest.raises(ValueError, match="one value per event"):
        stokes_parameters(phi, weights=[1.0, 2.0])


def test_bands_split_events():
    rng = np.random.default_rng(12)
    n = 30_000
    energy = rng.uniform(2, 8, n)
    phi = modulated_angles(rng, n, np.where(energy < 5, 0.1, 0.4), 0.0)
    bands = stokes_in_bands(phi, energy, [2, 5, 8, 9], modulation_factor=np.where(energy < 5, 0.2, 0.4))
    assert bands.results[2] is None
    assert bands.results[0].n_events + bands.results[1].n_events == n
    for r in bands.results[:2]:
        assert abs(r.degree - (0.5 if r is bands.results[0] else 1.0)) < 4 * r.degree_err
    assert "E (keV)" in repr(bands) and "<table>" in bands._repr_html_()


def test_result_prints_table():
    r = stokes_parameters(np.random.default_rng(13).uniform(-np.pi, np.pi, 1000), modulation_factor=0.3)
    text = repr(r)
    for word in ("degree", "angle", "MDP99", "Q (normalized)"):
        assert word in text
    assert "<table>" in r._repr_html_()
    d = r.to_dict()
    assert d["n_events"] == 1000 and "angle_deg" in d


def test_angle_of_undetected_polarization_is_not_given_as_a_number():
    # unpolarized events: below the 99 % detection level (P(unpolarized) >= 0.01, the level of the MDP99,
    # Weisskopf et al. 2010) every angle is compatible, so no angle +- error is printed
    rng = np.random.default_rng(14)
    r = stokes_parameters(rng.uniform(-np.pi, np.pi, 2000), modulation_factor=0.3)
    assert r.p_value_unpolarized >= 0.01 and not r.detected
    angle_row = [line for line in repr(r).splitlines() if line.strip().startswith("angle")][0]
    assert "undefined" in angle_row and "±" not in angle_row and "°" not in angle_row
    assert r.to_dict()["detected"] is False
    bands = stokes_in_bands(rng.uniform(-np.pi, np.pi, 2000), np.full(2000, 5.0), [4, 6], modulation_factor=0.3)
    assert "undefined" in repr(bands)
    strong = stokes_parameters(modulated_angles(rng, 20_000, 0.3, 0.4), modulation_factor=0.3)
    assert strong.detected and "±" in [line for line in repr(strong).splitlines() if "angle" in line][0]


def test_event_rows_say_what_they_count():
    rng = np.random.default_rng(15)
    phi = modulated_angles(rng, 5000, 0.2)
    text = repr(stokes_parameters(phi, modulation_factor=0.3))
    assert "events used" in text and "effective events" not in text  # unweighted: N_eff = N, not repeated
    weighted = repr(stokes_parameters(phi, modulation_factor=0.3, weights=rng.uniform(0.2, 1.0, 5000)))
    assert "effective events" in weighted and "(Σw)²/Σw²" in weighted


# ------------------------------------------------------------------------------------------------------ Rice
def test_rice_law_matches_scipy():
    # docs/methods.md section 4: p_hat of an unpolarized source is Rayleigh (Rice with p0 = 0): P(p_hat > x) =
    # exp(-x^2/(2 sigma^2)); the result's p_value_unpolarized is that tail (scipy.stats.rayleigh)
    rng = np.random.default_rng(14)
    r = stokes_parameters(modulated_angles(rng, 5000, 0.05, 0.0), modulation_factor=1.0)
    sigma = np.sqrt(0.5 * (r.q_err**2 + r.u_err**2))
    assert r.p_value_unpolarized == pytest.approx(stats.rayleigh.sf(r.degree, scale=sigma), rel=1e-9)


@pytest.mark.parametrize("p0_over_sigma", [0.0, 1.5, 4.0])
@pytest.mark.parametrize("cl", [0.6827, 0.9])
def test_rice_interval_coverage(p0_over_sigma, cl):
    # Neyman construction on the Rice law (docs/methods.md section 4): coverage equals the confidence level for every
    # true degree; p_hat drawn with scipy.stats.rice; 1200 draws -> binomial sigma <= 1.4 %
    rng = np.random.default_rng(int(1000 * p0_over_sigma + 100 * cl))
    sigma = 0.02
    draws = stats.rice.rvs(p0_over_sigma, scale=sigma, size=1200, random_state=rng) if p0_over_sigma > 0 else \
        stats.rayleigh.rvs(scale=sigma, size=1200, random_state=rng)
    p0 = p0_over_sigma * sigma
    covered = [lo <= p0 <= hi for lo, hi in (rice_interval(x, sigma, cl) for x in draws)]
    assert np.mean(covered) == pytest.approx(cl, abs=3.5 * np.sqrt(cl * (1 - cl) / 1200))


def test_rice_interval_limits():
    # large p_hat/sigma: the interval tends to the Gaussian p_hat +- sigma (Rice -> normal, scipy.stats.rice)
    lo, hi = rice_interval(1.0, 0.01, 0.6827)
    assert lo == pytest.approx(0.99, abs=2e-4) and hi == pytest.approx(1.01, abs=2e-4)
    # small p_hat: an upper limit
    lo, hi = rice_interval(0.001, 0.01)
    assert lo == 0.0 and hi > 0.01
    with pytest.raises(ValueError, match="confidence_level"):
        rice_interval(0.1, 0.01, 1.5)


@pytest.mark.slow
def test_rice_interval_coverage_on_event_toys():
    # the interval of a StokesResult covers the true degree at its level (68.27 %) on full event-level toys,
    # near the detection threshold where p_hat is most biased; 3000 sets -> binomial sigma 0.85 %
    rng = np.random.default_rng(15)
    mu, n, p = 0.3, 2000, 0.06
    covered = []
    for _ in range(3000):
        r = stokes_parameters(modulated_angles(rng, n, mu * p, 0.4), modulation_factor=mu)
        covered.append(r.degree_low <= p <= r.degree_high)
    print(f"Rice interval coverage on event toys: {np.mean(covered):.4f}")
    assert np.mean(covered) == pytest.approx(0.6827, abs=0.026)


@pytest.mark.slow
def test_fraction_above_mdp_full_size():
    # docs/methods.md section 9 [derived]: 0.0100 +- 0.002 for 1e5 unpolarized data sets
    rng = np.random.default_rng(16)
    n_sets, n, mu = 100_000, 100, 0.3
    above = 0
    threshold = mdp99(n, modulation_factor=mu)
    for _ in range(n_sets // 1000):
        phi = rng.uniform(-np.pi, np.pi, (1000, n))
        for row in phi:
            above += stokes_parameters(row, modulation_factor=mu, confidence_level=None).degree > threshold
    print(f"fraction above MDP99: {above / n_sets:.5f}")
    assert above / n_sets == pytest.approx(0.0100, abs=0.002)
