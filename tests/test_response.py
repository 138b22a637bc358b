"""Detector responses: efficiency against an independent xraydb calculation, bytes per event against h5py, the file
format, the cache, the process pool, and μ(E) against ``trackfit calibrate`` on the same simulated runs."""

import dataclasses
import json

import h5py
import numpy as np
import pytest

pytest.importorskip("xraydb")

import trackfit  # noqa: E402
from trackfit.response import DetectorResponse, ResponseFormatError, raw_bytes_per_event  # noqa: E402
from trackfit.response_builder import (  # noqa: E402
    MeasuredRun,
    ResponseSettings,
    absorption_table,
    build_response,
    default_energies_kev,
    response_from_calibration,
    useful_band_kev,
)
from trackfit.simulate import load_preset  # noqa: E402

#: ideal gas at 1 atm and 20 °C, mol/cm³ (k_B and N_A: CODATA exact values)
MOL_PER_CM3_1ATM = 101325.0 / (1.380649e-23 * 293.15) * 1e-6 / 6.02214076e23


def independent_window_gas(design, energy_kev):
    """Window transmission × gas absorption written from scratch with xraydb (not trackfit.simulate.gas): Be window
    with xraydb's total attenuation (material_mu), gas with Elam photoabsorption per element (mu_elam), ideal-gas
    densities and the Beer-Lambert law; atomic masses from the periodic table (IUPAC standard weights)."""
    import xraydb

    mass = {"H": 1.008, "He": 4.0026, "C": 12.011, "O": 15.999, "Ar": 39.948}
    atoms = {"He": {"He": 1}, "C2H6O": {"C": 2, "H": 6, "O": 1}, "Ar": {"Ar": 1}}
    energy_ev = np.asarray(energy_kev, dtype=float) * 1000.0
    w = design.window
    window = np.exp(-xraydb.material_mu(w.material, energy_ev, density=w.density_g_cm3, kind="total")
                    * w.thickness_um * 1e-4)
    g = design.gas
    n = MOL_PER_CM3_1ATM * g.pressure_atm * 293.15 / g.temperature_k
    mu = 0.0
    for molecule, fraction in zip(g.molecules, g.fractions, strict=True):
        for element, count in atoms[molecule].items():
            mu = mu + n * fraction * count * mass[element] * xraydb.mu_elam(element, energy_ev, kind="photo")
    return window * (1.0 - np.exp(-mu * g.gap_cm))


@pytest.fixture(scope="module")
def cache_dir(tmp_path_factory):
    return tmp_path_factory.mktemp("response_cache")


@pytest.fixture(scope="module")
def small_response(cache_dir):
    settings = ResponseSettings(energies_kev=(2.5, 6.0), events_per_energy=300, seed=4)
    return build_response(load_preset("hedme-1atm-1cm"), name="hedme", settings=settings, workers=1,
                          cache_dir=cache_dir, progress=False)


def test_efficiency_equals_an_independent_xraydb_calculation(small_response):
    r = small_response
    # Beer-Lambert with xraydb cross sections, computed independently of trackfit.simulate.gas (see the helper)
    expected = independent_window_gas(r.design, r.energy_kev)
    assert r["window_transmission"] * r["gas_absorption"] == pytest.approx(expected, rel=5e-3)
    between = np.array([2.7, 3.3, 4.4, 5.9])
    assert r.window_gas(between) == pytest.approx(independent_window_gas(r.design, between), rel=5e-3)
    # the efficiency is window x gas x the simulated shares (triggered / converted, selected / triggered)
    shares = r["trigger_fraction"] * r["selected_fraction"]
    assert r["detection_efficiency"] == pytest.approx(expected * shares, rel=5e-3)
    assert np.all((shares > 0.9) & (shares <= 1.0))  # clean simulated beams: almost every event is kept


def test_absorption_table_keeps_the_argon_k_edge_sharp():
    import xraydb

    design = load_preset("ardme-3atm-3cm")
    table = absorption_table(design, 2.0, 40.0)
    edge = xraydb.xray_edge("Ar", "K").energy / 1000.0            # 3.2059 keV in xraydb's (Elam) tables
    energies = [2.5, edge - 5e-4, edge + 5e-4, 10.0, 30.0]      # half an eV either side of the edge
    interpolated = np.interp(energies, table["energy_kev"], table["window_transmission"] * table["gas_absorption"])
    expected = independent_window_gas(design, energies)
    assert interpolated == pytest.approx(expected, rel=5e-3)
    assert expected[2] > expected[1] + 0.05  # a step of the argon K shell, not smeared by the interpolation


def test_default_grid_covers_the_useful_band():
    design = load_preset("hedme-1atm-1cm")
    lo, hi = useful_band_kev(design)
    assert (lo, hi) == (1.0, 8.0)
    # the rounded band encloses every energy where window x gas >= 1 % (checked on the independent calculation)
    energies = np.geomspace(0.6, 30.0, 800)
    inside = energies[independent_window_gas(design, energies) >= 0.01]
    assert lo <= inside.min() and inside.max() <= hi
    grid = default_energies_kev(design, ResponseSettings(n_energies=5))
    assert grid[0] == 1.0 and grid[-1] == 8.0 and len(grid) == 5 and np.all(np.diff(np.log(grid)) > 0)


def test_bytes_per_event_is_what_h5py_stores(tmp_path):
    from trackfit import RawEventWriter
    from trackfit.recon._synthetic import toy_tracks

    batch = toy_tracks(300, 2, roi_shape=(17, 13))
    path = tmp_path / "raw.h5"
    with RawEventWriter(path, batch.grid, compression="none") as writer:
        writer.append(batch)
    with h5py.File(path, "r") as f:
        events = f["events"]
        # h5py's count of the bytes of every per-event dataset (start holds N + 1 entries: one is the file's)
        stored = sum(events[name].size * events[name].dtype.itemsize for name in events)
        stored -= events["start"].dtype.itemsize
    assert raw_bytes_per_event(17 * 13) * len(batch) == stored


def test_file_round_trip_and_what_a_reader_refuses(small_response, tmp_path):
    path = small_response.save(tmp_path / "r.h5")
    back = DetectorResponse.load(path)
    assert back.name == "hedme" and back.origin == "simulation" and back.design == small_response.design
    for name, values in small_response.per_energy.items():
        assert np.array_equal(back[name], values, equal_nan=True), name
    assert back.selection == small_response.selection and back.settings == small_response.settings
    assert back.created_by.startswith("trackfit ")
    with h5py.File(path, "r") as f:
        assert f.attrs["trackfit_format"] == "response" and f.attrs["format_version"] == 1
    with pytest.raises(FileExistsError):
        small_response.save(path)

    broken = tmp_path / "broken.h5"
    small_response.save(broken)
    with h5py.File(broken, "a") as f:
        energy = f["per_energy/energy_kev"]
        energy[1] = energy[0]
    with pytest.raises(ResponseFormatError, match=r"dataset '/per_energy/energy_kev', energy index 1: energies must "
                                                  r"increase"):
        DetectorResponse.load(broken)
    with h5py.File(broken, "a") as f:
        del f["absorption/gas_absorption"]
    with pytest.raises(ResponseFormatError, match="dataset '/absorption/gas_absorption'"):
        DetectorResponse.load(broken)
    with h5py.File(broken, "a") as f:
        f.attrs["trackfit_format"] = "calibration"
    # another trackfit kind is named, with what to do with it
    with pytest.raises(ResponseFormatError, match=r"must be 'response' \(got 'calibration'\): this is a calibration"):
        DetectorResponse.load(broken)


def test_second_call_comes_from_the_cache(small_response, cache_dir, monkeypatch):
    import trackfit.response_builder as builder

    def no_simulation(task):
        raise AssertionError(f"simulated again at {task['energy_kev']} keV")

    monkeypatch.setattr(builder, "_measure_point", no_simulation)
    again = build_response(load_preset("hedme-1atm-1cm"), name="hedme", workers=1, cache_dir=cache_dir,
                           settings=ResponseSettings(energies_kev=(2.5, 6.0), events_per_energy=300, seed=4),
                           progress=False)
    for name, values in small_response.per_energy.items():
        assert np.array_equal(again[name], values, equal_nan=True), name
    # whatever decides a point is in its key: another seed, reconstruction setting, selection or version misses
    with pytest.raises(AssertionError, match="simulated again"):
        build_response(load_preset("hedme-1atm-1cm"), workers=1, cache_dir=cache_dir, progress=False,
                       settings=ResponseSettings(energies_kev=(2.5,), events_per_energy=300, seed=5))
    with pytest.raises(AssertionError, match="simulated again"):
        build_response(load_preset("hedme-1atm-1cm"), workers=1, cache_dir=cache_dir, progress=False,
                       settings=ResponseSettings(energies_kev=(2.5,), events_per_energy=300, seed=4),
                       recon_config=trackfit.ReconConfig(threshold_adc=12.0))
    from trackfit.analysis import ElongationCut
    from trackfit.response_builder import response_selection

    with pytest.raises(AssertionError, match="simulated again"):
        build_response(load_preset("hedme-1atm-1cm"), workers=1, cache_dir=cache_dir, progress=False,
                       settings=ResponseSettings(energies_kev=(2.5,), events_per_energy=300, seed=4),
                       selection=response_selection(ElongationCut(low=1.2)))
    monkeypatch.setattr(trackfit, "__version__", "0.0.0+other")
    with pytest.raises(AssertionError, match="simulated again"):
        build_response(load_preset("hedme-1atm-1cm"), workers=1, cache_dir=cache_dir, progress=False,
                       settings=ResponseSettings(energies_kev=(2.5,), events_per_energy=300, seed=4))


def test_process_pool_gives_the_same_response(small_response, tmp_path):
    # two spawned worker processes, one energy each, no cache: the same seeds give the same events
    pooled = build_response(load_preset("hedme-1atm-1cm"), name="hedme", workers=2, use_cache=False,
                            settings=ResponseSettings(energies_kev=(2.5, 6.0), events_per_energy=300, seed=4),
                            progress=False)
    for name, values in small_response.per_energy.items():
        assert np.array_equal(pooled[name], values, equal_nan=True), name


@pytest.mark.slow
def test_dask_cluster_gives_the_same_response(small_response):
    pytest.importorskip("dask.distributed", reason="needs the optional extra trackfit[dask]")
    on_cluster = build_response(load_preset("hedme-1atm-1cm"), name="hedme", scheduler="local", use_cache=False,
                                settings=ResponseSettings(energies_kev=(2.5, 6.0), events_per_energy=300, seed=4),
                                progress=False)
    for name, values in small_response.per_energy.items():
        assert np.array_equal(on_cluster[name], values, equal_nan=True), name


def test_settings_toml_refuses_unknown_keys(tmp_path):
    path = tmp_path / "settings.toml"
    settings = ResponseSettings(energies_kev=(2.0, 3.0), events_per_energy=500)
    path.write_text(settings.to_toml())
    assert ResponseSettings.read_toml(path) == settings
    path.write_text("[response]\nevents_per_energy = 500\nevent_count = 3\n")
    with pytest.raises(ValueError, match=r"unknown key\(s\) \['event_count'\]; valid keys are \['energies_kev'"):
        ResponseSettings.read_toml(path)
    with pytest.raises(ValueError, match="'events_per_energy' must be an integer >= 50"):
        ResponseSettings(events_per_energy=10)


@pytest.fixture(scope="module")
def simulated_runs(tmp_path_factory, cache_dir):
    """A response with its simulated runs kept, each run reconstructed and calibrated through the command line."""
    from trackfit.cli import main

    folder = tmp_path_factory.mktemp("runs")
    design = load_preset("hedme-1atm-1cm")
    response = build_response(design, name="hedme", workers=1, cache_dir=cache_dir, keep_runs=folder / "raw",
                              settings=ResponseSettings(energies_kev=(3.7, 5.9), events_per_energy=1500, seed=9),
                              progress=False)
    raws = sorted((folder / "raw").glob("*.h5"))
    assert [p.name for p in raws] == ["hedme_3.7kev.h5", "hedme_5.9kev.h5"]
    tables = []
    for raw in raws:
        table = folder / f"{raw.stem}_events.h5"
        assert main(["reconstruct", str(raw), "-o", str(table), "--no-progress"]) == 0
        tables.append(table)
    calibration = folder / "calibration.h5"
    assert main(["calibrate", "-o", str(calibration), *[a for t in tables for a in ("--polarized",
                                                                                     f"{t},angle_deg=0")]]) == 0
    return design, response, raws, tables, calibration


def test_mu_agrees_with_trackfit_calibrate_on_the_same_runs(simulated_runs):
    from trackfit.analysis import Calibration

    _, response, _, _, calibration = simulated_runs
    curve = Calibration.load(calibration).modulation_factor
    # same events, same selection, same estimator: the command line's calibration measures what the response says
    assert np.array(curve.points_value) == pytest.approx(response["modulation_factor"], abs=1e-6)
    assert np.array(curve.points_error) == pytest.approx(response["modulation_factor_err"], abs=1e-6)
    # and the runs' energies are the beams' (the simulator's nominal energy scale)
    assert np.array(curve.points_energy_kev) == pytest.approx(response.energy_kev, rel=0.05)


def test_response_from_a_calibration_file_matches_the_design(simulated_runs, tmp_path):
    design, response, raws, tables, calibration = simulated_runs
    measured = response_from_calibration(calibration, design, [MeasuredRun(r, t) for r, t in zip(raws, tables,
                                                                                                   strict=True)],
                                         name="built", n_energies=2)
    assert measured.origin == "calibration" and measured.energy_kev.size == 2
    # the grid is the calibration's measured range: there the curve through two points is each point
    from trackfit.analysis import Calibration

    curve = Calibration.load(calibration).modulation_factor
    assert measured["modulation_factor"] == pytest.approx(np.array(curve.points_value), abs=1e-9)
    # at the runs' own energies, the same runs seen as measured data give the same shares surviving the selection
    # and the same ROI sizes as the simulated response
    run_energies = [run["energy_kev"] for run in measured.settings["runs"]]
    measured = response_from_calibration(calibration, design, [MeasuredRun(r, t) for r, t in zip(raws, tables,
                                                                                                   strict=True)],
                                         name="built", energies_kev=run_energies)
    assert measured["selected_fraction"] == pytest.approx(response["selected_fraction"], abs=1e-12)
    assert measured["roi_pixels_mean"] == pytest.approx(response["roi_pixels_mean"], rel=1e-12)
    assert measured["bytes_per_event"] == pytest.approx(response["bytes_per_event"], rel=1e-12)
    assert np.all(measured["trigger_fraction"] == 1.0) and any("trigger" in n for n in measured.notes)
    # it plans like any response
    path = measured.save(tmp_path / "built.h5")
    assert DetectorResponse.load(path).settings["runs"][0]["raw"] == str(raws[0])
    # the same from the command line
    from trackfit.cli import main

    out = tmp_path / "built_cli.h5"
    assert main(["response", "--calibration", str(calibration), "--preset", "hedme-1atm-1cm", "--run", str(raws[0]),
                 str(tables[0]), "--run", str(raws[1]), str(tables[1]), "--name", "built", "--n-energies", "2",
                 "-o", str(out)]) == 0
    from_cli = DetectorResponse.load(out)
    assert from_cli.origin == "calibration" and from_cli.name == "built"
    assert from_cli["modulation_factor"] == pytest.approx(np.array(curve.points_value), abs=1e-9)
    short = trackfit.write_raw(tmp_path / "short.h5", trackfit.open_raw(raws[0]).read_batch(0, 100))
    with pytest.raises(ValueError, match="has 100 events but event table .* has 1500 rows"):
        response_from_calibration(calibration, design, [MeasuredRun(short, tables[0])])


def test_response_summary_and_info_command(small_response, tmp_path, capsys):
    from trackfit.cli import main

    path = small_response.save(tmp_path / "r.h5")
    assert main(["info", str(path)]) == 0
    text = capsys.readouterr().out
    assert "format        response v1" in text and small_response.to_markdown() in text
    assert main(["info", str(path), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["name"] == "hedme" and data["per_energy"]["energy_kev"] == [2.5, 6.0]
    assert data["settings"]["events_per_energy"] == 300


def test_replace_keeps_the_checks(small_response):
    with pytest.raises(ValueError, match="must be positive and increasing"):
        small_response.replace(per_energy={**small_response.per_energy, "energy_kev": np.array([3.0, 2.0])})
    assert dataclasses.replace(small_response, name="x").name == "x"
