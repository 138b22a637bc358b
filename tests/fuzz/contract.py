"""The contract every fuzz input is held to, and the seeded hypothesis runs that drive the inputs.

* accepted: one output row per input event, in order, whose first pass equals an independent recomputation
  (:mod:`.oracle`);
* refused: one of trackfit's own error types (:func:`.sandbox.our_error_names`), whose message names the file;
* never any other exception type, never a hang (the sandbox's time limit) and never a dead process.

The default test run tries a fast slice of inputs; ``-m slow`` runs a larger slice of the same properties.
With the environment variable ``TRACKFIT_FUZZ_REPORT`` set to a file name, a broken contract does not fail the
test: it is appended to that file (one JSON line: target, verdict, where it was raised, the input) and the run goes
on, which lists every kind of failure of a run instead of the first one.
"""

from __future__ import annotations

import itertools
import json
import os
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings

from .conftest import TALLY

#: examples per property: the fast slice of the default run and the large slice marked slow
SLICES = [pytest.param(25, id="fast"), pytest.param(150, id="large", marks=pytest.mark.slow)]
_names = itertools.count()


def explore(strategy, check, n_examples: int, examples=()) -> None:
    """Run ``check(example)`` on ``n_examples`` examples of ``strategy``: derandomized (the same inputs every
    run, so CI is reproducible), no example database, no deadline (the sandbox bounds the time per input).

    ``examples`` are inputs tried first in every slice: the defects found before, so they cannot come back.
    """

    @settings(max_examples=n_examples, derandomize=True, database=None, deadline=None, print_blob=True,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                     HealthCheck.function_scoped_fixture, HealthCheck.filter_too_much])
    @given(strategy)
    def run(value):
        check(value)

    for example_input in reversed(list(examples)):
        run = example(example_input)(run)
    run()


def fresh_name(folder: Path, stem: str, suffix: str = ".h5") -> Path:
    """A file name not used before in this test run."""
    return Path(folder) / f"{stem}-{next(_names)}{suffix}"


def record(target: str, verdict: str) -> None:
    TALLY[target][verdict] += 1


def _where(outcome) -> str:
    """The innermost frame of trackfit's own code in a traceback (else the innermost frame)."""
    frames = re.findall(r'File "([^"]+)", line (\d+), in (\S+)', outcome.traceback if outcome else "")
    ours = [f for f in frames if "/trackfit/" in f[0] and "/tests/" not in f[0]]
    frame = (ours or frames or [("", "", "")])[-1]
    return f"{Path(frame[0]).name}:{frame[1]} {frame[2]}" if frame[0] else ""


def fail(target: str, verdict: str, text: str, outcome=None) -> None:
    """Record a broken contract; fail the test (or, with ``TRACKFIT_FUZZ_REPORT``, append it to the report)."""
    record(target, verdict)
    report = os.environ.get("TRACKFIT_FUZZ_REPORT")
    if report:
        last = outcome.traceback.strip().splitlines()[-1] if outcome and outcome.traceback else ""
        with open(report, "a") as out:
            out.write(json.dumps({"target": target, "verdict": verdict, "where": _where(outcome), "error": last,
                                  "input": text[:600]}) + "\n")
        return
    pytest.fail(f"{target}: {verdict}\n{text}" + (f"\n{outcome.traceback}" if outcome and outcome.traceback else ""))


def check_no_failure(outcome, target: str, what: str) -> bool:
    """Neither a hang nor a dead child process."""
    if outcome.kind in ("hang", "died"):
        fail(target, outcome.kind, f"{what} (exit code {outcome.exitcode})")
        return False
    return True


def check_refusal(outcome, target: str, path, what: str) -> None:
    """A refusal must be one of our error types and name the file."""
    if not check_no_failure(outcome, target, what):
        return
    assert outcome.kind == "raised"
    if not outcome.ours:
        fail(target, f"foreign {outcome.error_type}", f"{what}\nraised {outcome.error_module}.{outcome.error_type}, "
             "not one of trackfit's error types", outcome)
    elif path is not None and Path(path).name not in outcome.message:
        fail(target, "refusal without the file name", f"{what}\nthe refusal does not name the file "
             f"{Path(path).name!r}: {outcome.message}", outcome)
    else:
        record(target, "refused")


def check_cli(outcome, target: str, what: str, *, files=(), flags=()) -> dict:
    """The command line: exit status 0 or 2, never a traceback; a refusal (status 2) names one of ``files`` (the
    input files of the command) or of ``flags`` (the flags typed), when given."""
    if not check_no_failure(outcome, target, what):
        return None
    if outcome.kind == "raised":
        fail(target, f"escaped {outcome.error_type}", f"{what}\ntrackfit.cli.main raised", outcome)
        return None
    result = outcome.value
    text = result["out"] + result["err"]
    if "Traceback" in text:
        fail(target, "traceback", f"{what}\na traceback reached the user:\n{text[-3000:]}")
    elif result["status"] not in (0, 2):
        fail(target, f"exit status {result['status']}", f"{what}\n{text[-3000:]}")
    elif result["status"] == 2 and (files or flags) and not any(
            name in result["err"] for name in [Path(f).name for f in files] + list(flags)):
        fail(target, "refusal without the file or flag", f"{what}\nthe error names none of "
             f"{[Path(f).name for f in files] + list(flags)}: {result['err']}")
    else:
        record(target, "refused" if result["status"] == 2 else "accepted")
    return result


def check_rows(value, target: str, what: str) -> None:
    """An accepted input: one row per event, in order, each with the independently recomputed first pass.

    ``value`` holds the events as read (``events``: roi, start, signal, bad, index, trigger_id), the chip
    (``grid``), the threshold used and the table columns (``columns``).
    """
    from .oracle import check_first_pass
    from .probes import FIRST_PASS_COLUMNS

    events = value["events"]
    columns = value["columns"]
    n = len(events["roi"])
    try:
        missing = [name for name in ("event_index", "trigger_id", "time_s") + FIRST_PASS_COLUMNS if name not in columns]
        assert not missing, f"the table lacks the columns {missing} (it has {sorted(columns)})"
        assert value["n_rows"] == n, f"{value['n_rows']} rows for {n} input events"
        for name, column in columns.items():
            assert len(column) == n, f"column {name} has {len(column)} entries for {n} events"
        assert (columns["event_index"] == events["index"]).all(), "rows out of order (event_index)"
        assert (columns["trigger_id"] == events["trigger_id"]).all(), "trigger_id not copied exactly"
        assert np.array_equal(columns["time_s"], events["time_s"], equal_nan=True), "time_s not copied exactly"
        start = events["start"]
        per_event = [(events["signal"][start[i]:start[i + 1]], events["roi"][i], bool(events["bad"][i]))
                     for i in range(n)]
        check_first_pass(columns, per_event, grid=value["grid"], threshold_adc=value["threshold_adc"],
                         bad_pixels=value.get("bad_pixels", ()))
    except AssertionError as err:
        fail(target, "wrong rows", f"{what}\naccepted, but: {err}")
        return
    record(target, "accepted")
