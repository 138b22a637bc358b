"""Settings sweeps (trackfit.tuning) on the sample runs."""

import math
from pathlib import Path

import numpy as np
import pytest

import trackfit
from trackfit.recon import ReconConfig, Status
from trackfit.tuning import read_settings, sweep_settings

SAMPLES = Path(__file__).resolve().parents[1] / "sample_data"
POLARIZED = SAMPLES / "pol100_5p9kev_30deg.h5"
UNPOLARIZED = SAMPLES / "fe55_flatfield_unpolarized.h5"
# the sweeps below tune the start search and the second pass: settings of the two-stage estimate
BASE = ReconConfig(counts_per_kev=3300.0, emission_estimator="two-stage")


@pytest.fixture(scope="module")
def sweep():
    return sweep_settings(POLARIZED, UNPOLARIZED,
                          recon_grid={"start_search_inner_rms": [1.2, 1.6], "second_pass_length_mm": [0.04, 0.07]},
                          cut_grid={"energy_kev": [(4.0, 8.0)], "elongation_min": [None, 1.3],
                                    "fiducial_radius_mm": [None, 1.0]},
                          base_config=BASE, n_events=3000)


def test_every_point_is_evaluated_and_reconstruction_reruns_only_per_setting(monkeypatch):
    calls = []
    original = trackfit.recon.reconstruct

    def counting(batch, config=None):
        calls.append(config)
        return original(batch, config)

    monkeypatch.setattr(trackfit.recon, "reconstruct", counting)
    result = sweep_settings(POLARIZED, UNPOLARIZED, recon_grid={"start_search_inner_rms": [1.2, 1.6, 2.0]},
                            cut_grid={"elongation_min": [None, 1.2, 1.5, 2.0]}, base_config=BASE, n_events=500)
    assert len(result) == 12
    assert len(calls) == 3 * 2  # one reconstruction of each run per reconstruction setting, none per cut
    assert sorted({c.start_search_inner_rms for c in calls}) == [1.2, 1.6, 2.0]


def test_metrics_match_direct_formulas(sweep):
    # Recompute one point by hand: Kislat et al. 2015 (modulation = 2 sqrt(<cos 2phi>^2 + <sin 2phi>^2) for a
    # 100 %-polarized beam), quality factor mu sqrt(eps) (docs/methods.md §2) and MDP99 = 4.29193 / (mu sqrt(N))
    # (Weisskopf et al. 2010).
    i = 5
    row = sweep.row(i)
    config = sweep.config(i)
    with trackfit.open_raw(POLARIZED) as reader:
        batch = reader.read_batch(0, 3000)
        n_run = len(reader)
    table = trackfit.reconstruct(batch, config)
    # the default selection: an emission angle and none of the failure bits listed in trackfit.recon.status
    failures = Status.MALFORMED_INPUT | Status.NO_SIGNAL | Status.TOO_FEW_PIXELS | Status.SINGLE_PIXEL | Status.ROUND
    keep = np.isfinite(table["emission_rad"]) & ((table["status"] & int(failures)) == 0)
    keep &= (table["energy_kev"] >= 4.0) & (table["energy_kev"] < 8.0)
    if not math.isnan(row["elongation_min"]):
        keep &= table["m2_major_mm2"] >= row["elongation_min"] * table["m2_minor_mm2"]
    if not math.isnan(row["fiducial_radius_mm"]):
        keep &= np.hypot(table["conv_x_mm"], table["conv_y_mm"]) <= row["fiducial_radius_mm"]
    phi = table["emission_rad"][keep].astype(float)
    mu = 2 * np.hypot(np.cos(2 * phi).mean(), np.sin(2 * phi).mean())
    eps = keep.sum() / 3000
    assert row["n_kept"] == keep.sum()
    assert row["efficiency"] == pytest.approx(eps)
    assert row["modulation"] == pytest.approx(mu, rel=1e-9)
    assert row["quality"] == pytest.approx(mu * math.sqrt(eps), rel=1e-9)
    assert row["mdp99"] == pytest.approx(4.29193 / (mu * math.sqrt(round(eps * n_run))), rel=1e-5)
    # modulation error for large N: sqrt(2/N) scaled (docs/methods.md §3, [derived]) -- within 10 % at mu ~ 0.5
    assert row["modulation_err"] == pytest.approx(math.sqrt(2 / keep.sum()), rel=0.1)


def test_best_point_and_settings_file(sweep, tmp_path):
    quality = sweep.columns["quality"]
    assert sweep.best_index == int(np.nanargmax(quality))
    # the sample polarized run is 100 % polarized: a modulation factor in the docs/methods.md §9 sanity band for
    # 5.9 keV (~0.47 +- 0.1, from memory) and an unpolarized residual consistent with zero (3 sigma)
    best = sweep.row()
    assert 0.37 < best["modulation"] < 0.65
    assert abs(best["residual_modulation"]) < 3 * best["residual_modulation_err"] + 0.02
    path = sweep.write_toml(tmp_path / "tuned.toml")
    config, selection = read_settings(path)
    assert config == sweep.config()
    assert ReconConfig.read_toml(path) == config  # what `trackfit reconstruct --config` reads
    table = trackfit.reconstruct(trackfit.open_raw(POLARIZED).read_batch(0, 3000), config)
    assert selection.mask(table).sum() == best["n_kept"]
    assert "quality" in path.read_text().splitlines()[1]


def test_residual_constraint_is_respected(sweep):
    significance = sweep.columns["residual_modulation"] / sweep.columns["residual_modulation_err"]
    limit = float(np.sort(significance)[len(significance) // 2])
    constrained = sweep_settings(POLARIZED, UNPOLARIZED,
                                 recon_grid={"start_search_inner_rms": [1.2, 1.6],
                                             "second_pass_length_mm": [0.04, 0.07]},
                                 cut_grid={"energy_kev": [(4.0, 8.0)], "elongation_min": [None, 1.3],
                                           "fiducial_radius_mm": [None, 1.0]},
                                 base_config=BASE, n_events=3000, max_residual_sigma=limit)
    chosen = constrained.best_index
    assert significance[chosen] < limit
    eligible = significance < limit
    assert constrained.columns["quality"][chosen] == np.max(sweep.columns["quality"][eligible])


def test_display_and_plot(sweep):
    text = repr(sweep)
    assert text.startswith("SweepResult: 16 points") and f"*{sweep.best_index} " in text
    assert "<table>" in sweep._repr_html_()
    fig = sweep.plot()
    assert len(fig.axes) == 4 * 4  # four metrics x four swept parameters (inner radius, weight, elongation, radius)


def test_bad_grids_are_named():
    with pytest.raises(ValueError, match=r"unknown reconstruction parameter\(s\) \['r_mni'\]"):
        sweep_settings(POLARIZED, recon_grid={"r_mni": [1.0]}, n_events=10)
    with pytest.raises(ValueError, match=r"unknown cut parameter\(s\) \['energy'\]"):
        sweep_settings(POLARIZED, cut_grid={"energy": [(1, 2)]}, n_events=10)
    with pytest.raises(ValueError, match="start_search_inner_rms"):
        sweep_settings(POLARIZED, recon_grid={"start_search_inner_rms": [-1.0]}, n_events=10)


def test_two_stage_settings_are_swept_only_with_the_two_stage_estimate():
    # the default (adaptive) estimate sets the start search and the second pass per track: a sweep of them would
    # show the same answer at every point, so it is refused with the way out
    with pytest.raises(ValueError, match="'start_search_inner_rms', a setting of the two-stage estimate.*"
                                         "'adaptive'.*emission_estimator = 'two-stage'"):
        sweep_settings(POLARIZED, recon_grid={"start_search_inner_rms": [1.2, 1.6]},
                       base_config=ReconConfig(counts_per_kev=3300.0), n_events=10)


def test_each_point_is_measured_with_its_own_estimate():
    result = sweep_settings(POLARIZED, recon_grid={"emission_estimator": ["two-stage", "adaptive"]},
                            base_config=BASE, n_events=2000)
    with trackfit.open_raw(POLARIZED) as reader:
        table = trackfit.reconstruct(reader.read_batch(0, 2000), ReconConfig(counts_per_kev=3300.0))
    # the default selection: an emission angle and none of the failure bits listed in trackfit.recon.status
    failures = Status.MALFORMED_INPUT | Status.NO_SIGNAL | Status.TOO_FEW_PIXELS | Status.SINGLE_PIXEL | Status.ROUND
    for i, column in enumerate(("emission_rad", "adaptive_emission_rad")):
        assert result.config(i).emission_estimator == ("two-stage", "adaptive")[i]
        phi = table[column][np.isfinite(table[column]) & ((table["status"] & int(failures)) == 0)].astype(float)
        # modulation = 2 |<exp(2i phi)>| of a 100 %-polarized run (Kislat et al. 2015)
        assert result.row(i)["modulation"] == pytest.approx(2 * abs(np.mean(np.exp(2j * phi))), rel=1e-9)
    assert result.row(0)["modulation"] != result.row(1)["modulation"]


def test_settings_file_drives_reconstruct_and_polarization_commands(sweep, tmp_path, capsys):
    import json

    from trackfit.cli import main

    settings = sweep.write_toml(tmp_path / "tuned.toml")
    table = tmp_path / "pol_events.h5"
    assert main(["reconstruct", str(POLARIZED), "-o", str(table), "--config", str(settings), "--no-progress"]) == 0
    assert main(["polarization", str(table), "--cuts", str(settings), "--modulation-factor", "0.5",
                 "--json", str(tmp_path / "result.json")]) == 0
    result = json.loads((tmp_path / "result.json").read_text())
    config, selection = read_settings(settings)
    expected = selection.mask(trackfit.read_table(table)).sum()
    assert result["stokes"]["n_events"] == expected
    assert trackfit.read_table(table).provenance["config_toml"] == config.to_toml()
