"""Conventions of every ``trackfit`` subcommand: defaults shown in --help, errors that name the flag the user typed,
hints when a file of the wrong kind is given, ``trackfit info`` on every kind of file, --print-settings."""

import argparse
import json
import re
import tomllib
from pathlib import Path

import pytest

from trackfit import ReconConfig, read_table, reconstruct_file
from trackfit.cli import HelpFormatter, build_parser, main, translate_parameters

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data"
#: a quoted snake_case word: how the library names its Python parameters in messages ('n_bins')
PYTHON_NAME = re.compile(r"['\"][a-z]+(?:_[a-z0-9]+)+['\"]")


def _subparsers():
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return action.choices


def _help_of(parser, action) -> str:
    formatter = parser._get_formatter()
    return formatter._expand_help(action) if action.help else ""


def _default_texts(default) -> set[str]:
    if isinstance(default, float):
        return {repr(default), f"{default:g}"}
    return {str(default)}


@pytest.mark.parametrize("name", sorted(_subparsers()))
def test_help_shows_every_default(name, capsys):
    parser = _subparsers()[name]
    assert parser.formatter_class is HelpFormatter
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction) or action.default is argparse.SUPPRESS:
            continue
        if action.nargs == 0 or action.required or not action.option_strings:
            continue  # switches (off unless given), required options and positional arguments have no default
        text = _help_of(parser, action)
        flag = action.option_strings[-1]
        assert re.search(r"\b(default|required)\b", text), \
            f"trackfit {name} {flag}: the help does not state the default ({text!r})"
        if action.default not in (None, []):
            assert any(t in text for t in _default_texts(action.default)), \
                f"trackfit {name} {flag}: default {action.default!r} not shown in {text!r}"
    with pytest.raises(SystemExit):
        main([name, "--help"])
    assert "default" in capsys.readouterr().out


def test_simulate_usage_shows_what_is_required():
    usage = _subparsers()["simulate"].format_usage()
    # -n and -o are required for a run; only --list-presets works without them
    assert "(CONFIG.toml | --preset NAME) -n N -o RAW.h5 [options]" in usage
    assert "[-n" not in usage and "[-o" not in usage
    assert "--list-presets" in usage


def test_batch_size_default_in_the_help_is_the_library_default():
    from trackfit.commands.reconstruct import DEFAULT_BATCH_SIZE
    from trackfit.recon import DEFAULT_BATCH_SIZE as LIBRARY_DEFAULT

    assert DEFAULT_BATCH_SIZE == LIBRARY_DEFAULT


def test_translate_parameters_only_touches_quoted_names():
    flags = {"n_bins": "--bins"}
    assert translate_parameters("'n_bins' must be > 0; n_bins_total is fine", flags) == \
        "--bins must be > 0; n_bins_total is fine"
    assert translate_parameters("column 'n_bins2' is missing", flags) == "column 'n_bins2' is missing"


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tables")
    short = reconstruct_file(SAMPLE / "pol100_5p9kev_120deg_short.h5", folder / "short.h5", progress=False)
    flat = reconstruct_file(SAMPLE / "fe55_flatfield_unpolarized.h5", folder / "flat.h5", progress=False)
    return {"short": str(short), "flat": str(flat), "folder": folder}


#: (command line with {short}, {flat} and {raw} placeholders, the flag the error must name)
FLAG_ERRORS = [
    (["polarization", "{short}", "--modulation-factor", "0.5", "--bins", "10"], "--bins"),
    (["polarization", "{short}", "--modulation-factor", "0.5", "--confidence", "2"], "--confidence"),
    (["polarization", "{short}", "--modulation-factor", "0.5", "--bands", "7", "5"], "--bands"),
    (["polarization", "{short}", "--modulation-factor", "2"], "--modulation-factor"),
    (["polarization", "{short}"], "--modulation-factor"),
    (["polarization", "{short}", "--modulation-factor", "0.5", "--bkg-circle", "3", "3", "1",
      "--background-scale", "-1"], "--background-scale"),
    (["polarization", "{short}", "--modulation-factor", "0.5", "--circle", "0", "0", "-1"], "--circle"),
    (["polarization", "{short}", "--modulation-factor", "0.5", "--energy-kev", "8", "4"], "--energy-kev"),
    (["polarization", "{short}", "--modulation-factor", "0.5", "--bkg-energy-kev", "8", "4",
      "--background-scale", "1"], "--bkg-energy-kev"),
    (["calibrate", "-o", "{out}", "--flat-field", "{flat}", "--gain-cell-mm", "-1"], "--gain-cell-mm"),
    (["calibrate", "-o", "{out}", "--flat-field", "{flat}", "--gain-cell-mm", "2.5", "--gain-min-counts", "5"],
     "--gain-min-counts"),
    (["calibrate", "-o", "{out}", "--unpolarized", "{flat}", "--spurious-cell-mm", "0"], "--spurious-cell-mm"),
    (["calibrate", "-o", "{out}", "--unpolarized", "{flat}", "--spurious-min-counts", "-2"],
     "--spurious-min-counts"),
    (["calibrate", "-o", "{out}", "--unpolarized", "{flat}", "--spurious-cell-mm", "10",
      "--spurious-energy-edges", "7", "3"], "--spurious-energy-edges"),
    (["calibrate", "-o", "{out}", "--flat-field", "{flat}", "--extent-mm", "5", "-5", "5", "-5"], "--extent-mm"),
    (["calibrate", "-o", "{out}", "--polarized", "{short},degree=2", "--spurious-cell-mm", "10"], "--polarized"),
    (["calibrate", "-o", "{out}", "--flat-field", "{flat}", "--line", "{short},energy_kev=-5.9"], "--line"),
    (["simulate", "--preset", "hedme-1atm-1cm", "-n", "5", "-o", "{out}", "--energy-kev", "-1"], "--energy-kev"),
    (["simulate", "--preset", "hedme-1atm-1cm", "-n", "5", "-o", "{out}", "--polarization-degree", "2"],
     "--polarization-degree"),
    (["simulate", "--preset", "hedme-1atm-1cm", "-n", "5", "-o", "{out}", "--polarization-angle-deg", "nan"],
     "--polarization-angle-deg"),
    (["simulate", "--preset", "hedme-1atm-1cm", "-o", "{out}"], "-n/--n-events"),
    (["reconstruct", "{raw}", "-o", "{out}", "--threads", "0"], "--threads"),
    (["reconstruct", "{raw}", "-o", "{out}", "--batch-size", "0"], "--batch-size"),
    (["info", "{raw}", "--max-events", "0"], "--max-events"),
    (["info", "{raw}", "--open-timeout", "0"], "--open-timeout"),
    (["show", "{raw}", "--event", "-1", "-o", "{out}"], "--event"),
]


@pytest.mark.parametrize("argv, flag", FLAG_ERRORS, ids=[" ".join(a[:1] + [f]) for a, f in FLAG_ERRORS])
def test_errors_name_the_flag_not_the_parameter(tables, argv, flag, capsys):
    values = {"short": tables["short"], "flat": tables["flat"], "out": str(tables["folder"] / "out.h5"),
              "raw": str(SAMPLE / "pol100_5p9kev_120deg_short.h5")}
    assert main([a.format(**values) for a in argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err  # one line, no traceback
    assert flag in err, err
    assert not PYTHON_NAME.search(err), f"a Python parameter name reaches the user: {err}"


def test_a_raw_file_where_a_table_belongs_hints_to_reconstruct(tables, capsys):
    raw = str(SAMPLE / "pol100_5p9kev_120deg_short.h5")
    assert main(["polarization", raw, "--modulation-factor", "0.5"]) == 2
    assert "raw event file; reconstruct it into an event table first: trackfit reconstruct" in capsys.readouterr().err
    assert main(["calibrate", "-o", str(tables["folder"] / "c.h5"), "--flat-field", raw]) == 2
    assert "trackfit reconstruct RAW.h5 -o TABLE.h5" in capsys.readouterr().err
    assert main(["show", tables["short"], "--event", "0"]) == 2
    assert "this is an event table, already reconstructed" in capsys.readouterr().err


def test_info_summarises_event_tables(tables, capsys):
    assert main(["info", tables["short"]]) == 0
    text = capsys.readouterr().out
    table = read_table(tables["short"])
    assert table.summary() in text  # the table's own summary, reused
    assert "format        event-table v2" in text and "provenance    energy_scale_source" in text
    assert main(["info", tables["short"], "--json", "--max-events", "100"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["n_rows_read"] == 100 and data["header"]["trackfit_format"] == "event-table"
    first = read_table(tables["short"], stop=100)
    # statistics against numpy on the same rows
    assert data["summary"]["columns"]["pulse_height"]["max"] == pytest.approx(float(first["pulse_height"].max()))
    assert data["provenance"]["energy_scale_source"] == "raw file"


def test_info_marks_uncalibrated_tables(tmp_path, capsys):
    from trackfit import RawEventWriter
    from trackfit.recon._synthetic import toy_tracks

    batch = toy_tracks(50, 1, roi_shape=(12, 12))
    raw = tmp_path / "measured.h5"
    with RawEventWriter(raw, batch.grid, run_info={"source": "bench"}) as writer:
        writer.append(batch)
    assert main(["info", str(raw)]) == 0
    assert "energy scale  none in the file" in capsys.readouterr().out
    out = tmp_path / "measured_events.h5"
    assert main(["reconstruct", str(raw), "-o", str(out), "--no-progress"]) == 0
    assert "energy_kev UNCALIBRATED" in capsys.readouterr().out
    assert main(["info", str(out)]) == 0
    text = capsys.readouterr().out
    assert "energy_kev (uncalibrated)" in text and "UNCALIBRATED" in text


def test_info_summarises_calibration_files(tmp_path, capsys):
    from trackfit.analysis import Calibration, EnergyScale

    scale = EnergyScale.from_lines([19_400.0], [5.895])
    calibration = Calibration().with_part("energy_scale", scale, {"runs": ["flat.h5"], "weights": "none"})
    path = calibration.save(tmp_path / "cal.h5")
    assert main(["info", str(path)]) == 0
    text = capsys.readouterr().out
    assert repr(Calibration.load(path)) in text and "format        calibration v1" in text
    assert main(["info", str(path), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert list(data["parts"]) == ["energy_scale"] and data["parts"]["energy_scale"]["provenance"]["runs"] == [
        "flat.h5"]
    other = tmp_path / "other.h5"
    import h5py

    with h5py.File(other, "w") as f:
        f.attrs["trackfit_format"] = "something-else"
    assert main(["info", str(other)]) == 2
    assert ("expected a root attribute trackfit_format of ['raw-events', 'event-table', 'calibration', 'pixel-map', "
            "'response']") in capsys.readouterr().err


def test_print_settings_is_the_shipped_example(capsys):
    with pytest.raises(SystemExit) as exit_:
        main(["reconstruct", "--print-settings"])
    assert exit_.value.code == 0
    text = capsys.readouterr().out
    # parsed by the standard library's TOML reader, the text gives every setting at its default
    values = tomllib.loads(text)["recon"]
    assert set(values) | {"counts_per_kev"} == set(ReconConfig.field_names())
    assert ReconConfig.from_toml(text) == ReconConfig()
    assert "# counts_per_kev = " in text  # not set by default: shown commented out, with what happens then
    example = ROOT / "docs" / "examples" / "recon.toml"
    assert example.read_text() == text, "regenerate: trackfit reconstruct --print-settings > docs/examples/recon.toml"


def test_progress_bars_count_events(tables, tmp_path, capsys):
    out = tmp_path / "t.h5"
    assert main(["reconstruct", str(SAMPLE / "pol100_5p9kev_120deg_short.h5"), "-o", str(out)]) == 0
    err = capsys.readouterr().err
    assert "events/s" in err and "kev/s" not in err.lower().replace("events/s", "")
    assert main(["simulate", "--preset", "hedme-1atm-1cm", "-n", "20", "--seed", "1", "-o",
                 str(tmp_path / "s.h5")]) == 0
    assert " events" in capsys.readouterr().err
