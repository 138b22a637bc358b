"""Fuzzing the command line: every subcommand that reads a file, on mutated and damaged files, and generated flag
values on valid files.

``trackfit.cli.main`` runs in the sandboxed child process (its output captured, as ``capsys`` would) so that a
hang is bounded; a few inputs also run as real ``python -m trackfit`` processes, and ``trackfit info`` on valid
files runs in this process with ``capsys``. The contract: exit status 0 or 2
(2 with one line naming the input file), never a traceback, never an escaping exception, never a hang.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import strategies as st

from . import probes
from .contract import SLICES, check_cli, explore, fresh_name, record
from .mutations import apply_bytes, apply_structural, byte_mutations, describe, structural_mutations
from .sandbox import NEUTRALISED

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def commands_for(kind: str, path, folder) -> list[list]:
    """Command lines that read a file of the given kind (outputs go to new names in ``folder``)."""
    if kind == "raw":
        return [["info", path], ["info", "--json", path],
                ["reconstruct", path, "-o", fresh_name(folder, "cli-table"), "--no-progress", "--threads", "1"],
                ["reconstruct", path, "-o", fresh_name(folder, "cli-table"), "--no-progress", "--strict"],
                ["show", path, "--event", "1", "-o", fresh_name(folder, "cli-event", ".png")]]
    if kind == "table":
        return [["info", path], ["info", "--json", path],
                ["polarization", path, "--modulation-factor", "0.3", "--json", fresh_name(folder, "cli-pol", ".json")],
                ["calibrate", "--line", f"{path},energy_kev=5.9", "-o", fresh_name(folder, "cli-cal")]]
    return [["info", path], ["info", "--json", path]]


def run_commands(sandbox, kind, path, folder, what):
    for argv in commands_for(kind, path, folder):
        outcome = sandbox.run(probes.cli, argv)
        check_cli(outcome, f"CLI: {argv[0]} on a {kind} file", f"{what}\ntrackfit {' '.join(map(str, argv))}",
                  files=[path])


@pytest.mark.parametrize("kind", ["raw", "table", "calibration"])
@pytest.mark.parametrize("n_examples", [pytest.param(6, id="fast"), pytest.param(40, id="large",
                                                                                  marks=pytest.mark.slow)])
def test_commands_on_mutated_files(kind, n_examples, sandbox, base_raw, base_table, base_calibration, outside_file,
                                   fuzz_dir):
    base = {"raw": base_raw, "table": base_table, "calibration": base_calibration}[kind]

    def check(example):
        how, mutations = example
        path = fresh_name(fuzz_dir, f"cli-{kind}-{how}")
        if how == "structure":
            done = apply_structural(base, path, mutations, outside_file)
        else:
            done = apply_bytes(base, path, mutations)
        run_commands(sandbox, kind, path, fuzz_dir, describe(done))

    explore(st.one_of(st.tuples(st.just("structure"), structural_mutations(2)),
                      st.tuples(st.just("bytes"), byte_mutations(2))), check, n_examples)


# ---------------------------------------------------------------------------------------------- generated flags
NUMBERS = ["0", "-1", "1", "3", "12", "36", "1e300", "nan", "inf", "-inf", "0.5", "x", "", "9223372036854775808"]
FLAGS = {
    "reconstruct": ["--batch-size", "--threads", "--workers", "--part-events", "--threshold-noise-rms"],
    "polarization": ["--bins", "--confidence", "--modulation-factor", "--bands", "--energy-kev", "--circle",
                     "--min-elongation", "--background-scale"],
    "show": ["--event", "--threshold-adc"],
    "info": ["--max-events"],
}
ARITY = {"--energy-kev": 2, "--circle": 3, "--bands": 2}


@st.composite
def command_lines(draw):
    command = draw(st.sampled_from(sorted(FLAGS)))
    flags = draw(st.lists(st.sampled_from(FLAGS[command]), min_size=1, max_size=3, unique=True))
    values = []
    for flag in flags:
        values += [flag] + [draw(st.sampled_from(NUMBERS)) for _ in range(ARITY.get(flag, 1))]
    return command, values


@pytest.mark.parametrize("n_examples", SLICES)
def test_generated_flag_values(n_examples, sandbox, base_raw, base_table, fuzz_dir):
    def check(example):
        command, values = example
        if command == "reconstruct":
            argv = [command, base_raw, "-o", fresh_name(fuzz_dir, "flags-table"), "--no-progress", *values]
        elif command == "polarization":
            argv = [command, base_table, *values]
            if "--modulation-factor" not in values:
                argv += ["--modulation-factor", "0.3"]
        elif command == "show":
            argv = [command, base_raw, "-o", fresh_name(fuzz_dir, "flags-event", ".png"), *values]
            if "--event" not in values:
                argv += ["--event", "0"]
        else:
            argv = [command, base_table, *values]
        outcome = sandbox.run(probes.cli, argv)
        # a refusal names a flag typed (argparse's own refusals do too) or the input file
        check_cli(outcome, f"CLI flags: {command}", f"trackfit {' '.join(map(str, argv))}",
                  files=[argv[1]], flags=[v for v in values if v.startswith("--")])

    explore(command_lines(), check, n_examples)


# ---------------------------------------------------------------------------------------------- real processes
@pytest.mark.parametrize("damage", ["truth group replaced by a dataset", "header bytes damaged", "named pipe"])
def test_damaged_inputs_in_a_real_process(damage, base_raw, outside_file, fuzz_dir):
    # the console script as a user runs it: exit status 0 or 2, one line, no traceback, within a time limit
    path = fresh_name(fuzz_dir, "process-input")
    if damage == "truth group replaced by a dataset":
        apply_structural(base_raw, path, [("dataset_for_group", 0, 0)], outside_file)
        import h5py

        with h5py.File(path, "r+") as f:  # make sure the group replaced is /truth
            if "truth" in f and isinstance(f["truth"], h5py.Group):
                del f["truth"]
                f["truth"] = [1, 2, 3]
    elif damage == "header bytes damaged":
        apply_bytes(base_raw, path, [("zero", 300, 55), ("flip", 137, 3)])
    else:
        if not hasattr(os, "mkfifo"):
            pytest.skip("named pipes need a POSIX system")
        os.mkfifo(path)
    env = {k: v for k, v in os.environ.items() if k not in NEUTRALISED}
    env["PYTHONPATH"] = ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")
    for argv in (["info", str(path)], ["reconstruct", str(path), "-o", str(fresh_name(fuzz_dir, "process-table")),
                                       "--no-progress"]):
        try:
            done = subprocess.run([sys.executable, "-m", "trackfit", *argv], capture_output=True, text=True,
                                  timeout=60, env=env)
        except subprocess.TimeoutExpired:
            pytest.fail(f"trackfit {' '.join(argv)} on a {damage}: still running after 60 s")
        text = done.stdout + done.stderr
        assert "Traceback" not in text, text
        assert done.returncode in (0, 2), f"exit status {done.returncode}: {text}"
        if done.returncode == 2:
            assert path.name in done.stderr and len(done.stderr.strip().splitlines()) == 1, done.stderr


# ---------------------------------------------------------------------------------------------- in this process
@pytest.mark.skipif(not hasattr(signal, "SIGALRM"), reason="the time limit uses SIGALRM")
@pytest.mark.parametrize("n_examples", SLICES)
def test_info_in_this_process(n_examples, base_table, base_calibration, capsys):
    # trackfit.cli.main itself, with pytest's capsys, on valid files (nothing here can loop inside HDF5, so a
    # SIGALRM time limit is enough): the summary prints, or a bad --max-events is refused naming the flag
    from trackfit.cli import main

    def timed_out(signum, frame):
        raise TimeoutError("trackfit info did not finish within 60 s")

    def check(example):
        path, flags = example
        argv = ["info", str(path), *flags]
        previous = signal.signal(signal.SIGALRM, timed_out)
        signal.alarm(60)
        try:
            status = main(argv)
        except SystemExit as exit_:  # argparse refusing a value
            status = exit_.code
        finally:
            signal.alarm(0)
            signal.signal(signal.SIGALRM, previous)
        out, err = capsys.readouterr()
        assert "Traceback" not in out + err
        assert status in (0, 2), f"trackfit {' '.join(argv)}: exit status {status}\n{err}"
        if status == 2:
            last = err.strip().splitlines()[-1]  # argparse prints its usage first
            assert last.startswith("trackfit info: error:") and "--max-events" in last, err
        else:
            assert Path(path).name in out
        record("CLI in this process: info", "refused" if status else "accepted")

    flags = st.lists(st.one_of(st.just(["--json"]), st.sampled_from(NUMBERS).map(lambda v: ["--max-events", v])),
                     max_size=2).map(lambda groups: [f for g in groups for f in g])
    explore(st.tuples(st.sampled_from([base_table, base_calibration]), flags), check, n_examples)
