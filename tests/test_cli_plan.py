"""``trackfit response`` and ``trackfit plan`` on the command line: files, JSON keys, figures, and errors that name
the flag."""

import json
import math

import pytest

pytest.importorskip("xraydb")

from trackfit.cli import main  # noqa: E402
from trackfit.response import DetectorResponse  # noqa: E402

#: the keys every design of a plan's JSON holds
PLAN_KEYS = ("mdp99", "exposure_for_target_s", "effective_modulation_factor", "source_counts", "background_counts",
             "bytes_per_day")


@pytest.fixture(scope="module")
def responses(tmp_path_factory):
    folder = tmp_path_factory.mktemp("responses")
    paths = []
    for preset, energies in (("hedme-1atm-1cm", ["2", "4", "8"]), ("ardme-3atm-3cm", ["2", "8", "20"])):
        path = folder / f"{preset}.h5"
        assert main(["response", "--preset", preset, "-o", str(path), "--energies-kev", *energies,
                     "--events-per-energy", "200", "--workers", "1", "--cache-dir", str(folder / "cache"),
                     "--no-progress"]) == 0
        paths.append(path)
    return folder, paths


def test_response_command_writes_a_response(responses, capsys):
    _, (hedme, _) = responses
    response = DetectorResponse.load(hedme)
    assert response.name == "hedme-1atm-1cm" and response.energy_kev.tolist() == [2.0, 4.0, 8.0]
    assert response.settings["events_per_energy"] == 200
    assert response["n_triggered"].tolist() == [200.0, 200.0, 200.0]


def test_second_call_is_served_from_the_cache(responses, capsys):
    folder, (hedme, _) = responses
    assert main(["response", "--preset", "hedme-1atm-1cm", "-o", str(hedme), "--energies-kev", "2", "4", "8",
                 "--events-per-energy", "200", "--workers", "1", "--cache-dir", str(folder / "cache"),
                 "--overwrite"]) == 0
    captured = capsys.readouterr()
    assert "3/3" in captured.err and "wrote" in captured.out  # the bar starts full: every energy was cached


def test_plan_writes_json_with_every_key_and_figures(responses, tmp_path, capsys):
    _, paths = responses
    out = tmp_path / "plan.json"
    figures = tmp_path / "figures"
    assert main(["plan", *map(str, paths), "--photon-index", "2", "--flux", "1.5", "--area-cm2", "100",
                 "--background", "1e-3", "--band-kev", "2", "8", "--exposure-s", "1e5", "--target-mdp", "0.02",
                 "--absorption-cm2", "1e21", "--json", str(out), "--figures", str(figures)]) == 0
    text = capsys.readouterr().out
    assert "| hedme-1atm-1cm |" in text and "MDP99 per band" in text
    data = json.loads(out.read_text())
    assert list(data["designs"]) == ["hedme-1atm-1cm", "ardme-3atm-3cm"]
    for design in data["designs"].values():
        for key in PLAN_KEYS:
            assert isinstance(design[key], float) and design[key] > 0, key
        # the exposure for the target is the exposure scaled by (MDP99 / target)^2 (MDP ∝ T^-1/2)
        assert design["exposure_for_target_s"] == pytest.approx(1e5 * (design["mdp99"] / 0.02) ** 2, rel=1e-9)
        assert math.isclose(design["gb_per_day"], design["bytes_per_day"] / 1e9)
    assert data["observation"]["flux_at_1kev"] == 1.5 and data["observation"]["absorption_column_cm2"] == 1e21
    assert sorted(p.name for p in figures.glob("*.png")) == ["detected_spectra.png", "mdp_vs_exposure.png",
                                                             "response_curves.png"]
    assert all(p.stat().st_size > 10_000 for p in figures.glob("*.png"))


def test_plan_reads_tables_and_an_observation_file(responses, tmp_path, capsys):
    _, (hedme, _) = responses
    area = tmp_path / "area.csv"
    area.write_text("energy_kev,area_cm2\n1,40\n10,60\n")
    spectrum = tmp_path / "spectrum.csv"
    spectrum.write_text("energy_kev,flux\n1,1.0\n3,0.11\n10,0.01\n")
    observation = tmp_path / "obs.toml"
    observation.write_text("[observation]\nband_kev = [2.0, 8.0]\nexposure_s = 1e4\n")
    out = tmp_path / "plan.json"
    assert main(["plan", str(hedme), "--observation", str(observation), "--spectrum", str(spectrum), "--area-cm2",
                 str(area), "--json", str(out), "--name", "cell"]) == 0
    data = json.loads(out.read_text())
    assert list(data["designs"]) == ["cell"]
    assert data["observation"]["area_energies_kev"] == [1.0, 10.0]
    assert data["designs"]["cell"]["exposure_for_target_s"] is None  # no target given


PLAN_ERRORS = [
    (["--flux", "1", "--area-cm2", "10", "--band-kev", "2", "8", "--exposure-s", "1e4", "--target-mdp", "5"],
     "--target-mdp must be a fraction in (0, 1)"),
    (["--flux", "1", "--area-cm2", "10", "--band-kev", "8", "2", "--exposure-s", "1e4"], "--band-kev must be"),
    (["--flux", "-1", "--area-cm2", "10", "--band-kev", "2", "8", "--exposure-s", "1e4"], "--flux must be > 0"),
    (["--flux", "1", "--area-cm2", "10", "--band-kev", "2", "8"], "--exposure-s T is required"),
    (["--flux", "1", "--band-kev", "2", "8", "--exposure-s", "1e4"], "--area-cm2 A"),
    (["--flux", "1", "--area-cm2", "missing.csv", "--band-kev", "2", "8", "--exposure-s", "1e4"],
     "area (--area-cm2) file 'missing.csv' does not exist"),
    (["--flux", "1", "--area-cm2", "10", "--band-kev", "0.5", "8", "--exposure-s", "1e4"],
     "--band-kev 0.5-8 keV is not inside the 2-8 keV that response"),
    (["--flux", "1", "--area-cm2", "10", "--band-kev", "2", "8", "--exposure-s", "1e4", "--compressed-fraction",
      "2"], "--compressed-fraction must be in (0, 1]"),
]


@pytest.mark.parametrize("argv, message", PLAN_ERRORS, ids=[m[:30] for _, m in PLAN_ERRORS])
def test_plan_errors_name_the_flag(responses, argv, message, capsys):
    _, (hedme, _) = responses
    assert main(["plan", str(hedme), *argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert message in err, err


RESPONSE_ERRORS = [
    (["--preset", "hedme-1atm-1cm", "--events-per-energy", "10"], "--events-per-energy must be an integer >= 50"),
    (["--preset", "hedme-1atm-1cm", "--energies-kev", "4", "2"], "--energies-kev must be positive and increasing"),
    ([], "give the design with either --preset NAME or --design DESIGN.toml"),
    (["--preset", "nope"], "unknown preset 'nope'"),
    (["--preset", "hedme-1atm-1cm", "--calibration", "cal.h5"], "--calibration needs at least one --run"),
    (["--preset", "hedme-1atm-1cm", "--workers", "0"], "--workers must be >= 1"),
]


def test_a_design_that_never_triggers_is_an_error_not_a_traceback(tmp_path, capsys):
    from trackfit.simulate import load_preset

    design = load_preset("hedme-1atm-1cm")
    text = design.to_toml().replace("trigger_threshold_electrons = 1000.0", "trigger_threshold_electrons = 1e12")
    path = tmp_path / "deaf.toml"
    path.write_text(text)
    assert main(["response", "--design", str(path), "--energies-kev", "3", "--events-per-energy", "50",
                 "--workers", "1", "--no-cache", "--no-progress", "-o", str(tmp_path / "r.h5")]) == 2
    err = capsys.readouterr().err
    assert "at 3 keV: no event triggered" in err and "Traceback" not in err
    assert not (tmp_path / "r.h5").exists()


@pytest.mark.parametrize("argv, message", RESPONSE_ERRORS, ids=[m[:30] for _, m in RESPONSE_ERRORS])
def test_response_errors_name_the_flag(argv, message, tmp_path, capsys):
    assert main(["response", "-o", str(tmp_path / "r.h5"), *argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert message in err, err
