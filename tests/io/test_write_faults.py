"""Writers under faults: concurrent writers of one output, a full disk, a file-size limit, unwritable targets,
kill -9 and a rerun, and files of no events.

The contract (``docs/table-format.md``, "Writers"): a file with its final name is complete and exact; a writer that
cannot write raises ``FileWriteError`` (an ``OSError``) naming the file and the cause, removes its partial file and
never crashes the process; a command exits with status 2 and one line, never a traceback or a signal. Real faults
are used where the machine allows (a file-size limit through ``setrlimit``, a 1 MB tmpfs in a user namespace for a
full disk); injected ones (a write that fails after N bytes) reach every writer.
"""

import errno
import functools
import os
import pickle
import resource
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trackfit import EventBatch, RawEventWriter, read_table, reconstruct, reconstruct_file, write_table
from trackfit.io import _partial
from trackfit.io._partial import PartialFileWriter, partial_files, partial_path, write_text_file
from trackfit.io.errors import FileWriteError
from trackfit.recon._synthetic import toy_tracks

ENV = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path), "MPLBACKEND": "agg"}


def _raw(folder: Path, n: int = 2000, name: str = "run.h5", seed: int = 5) -> Path:
    batch = toy_tracks(n, seed, roi_shape=(16, 16))
    batch = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, time_s=np.arange(n) * 1e-3,
                       trigger_id=np.arange(n) * 2 + 1, grid=batch.grid, truth=batch.truth)
    path = folder / name
    with RawEventWriter(path, batch.grid, run_info={"nominal_counts_per_kev": 2500.0}) as writer:
        writer.append(batch)
    return path


def _same_rows(a, b):
    assert list(a) == list(b)
    for name in a:
        assert a[name].dtype == b[name].dtype, name
        assert np.array_equal(a[name], b[name], equal_nan=a[name].dtype.kind == "f"), name


def _trackfit(*args, cwd=None, preexec_fn=None, timeout=300):
    return subprocess.run([sys.executable, "-m", "trackfit", *map(str, args)], env=ENV, cwd=cwd, capture_output=True,
                          text=True, preexec_fn=preexec_fn, timeout=timeout)


def _file_size_limit(n_bytes):
    def apply():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # writes past the limit then fail with EFBIG
        resource.setrlimit(resource.RLIMIT_FSIZE, (n_bytes, n_bytes))
    return apply


@functools.cache
def _user_namespaces() -> bool:
    """Whether this machine lets an unprivileged process mount a tmpfs in its own namespace (``unshare -rm``)."""
    try:
        return subprocess.run(["unshare", "-rm", "true"], capture_output=True, timeout=30).returncode == 0
    except (OSError, subprocess.SubprocessError):
        return False


def _assert_one_line_error(result, *texts):
    assert result.returncode == 2, (result.returncode, result.stderr)  # not a signal (negative), not a crash
    assert "Traceback" not in result.stderr
    for text in texts:
        assert text in result.stderr, result.stderr


# ------------------------------------------------------------------------------------------------ partial files
def test_each_writer_has_its_own_partial_file_created_exclusively(tmp_path):
    path = tmp_path / "t.h5"
    first, second = PartialFileWriter(), PartialFileWriter()
    first._open(path, overwrite=False)
    second._open(path, overwrite=False)
    try:
        assert first.partial_path != second.partial_path
        assert partial_files(path) == sorted([first.partial_path, second.partial_path])
        assert first.partial_path.name.startswith(f"t.h5.{_partial._HOST}-{os.getpid()}-")
    finally:
        first.abort()
        second.abort()
    assert list(tmp_path.iterdir()) == []
    # a name that exists is never opened (O_EXCL), and never deleted by the writer that could not create it
    taken = partial_path(path)
    taken.write_bytes(b"someone else's")
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_partial, "partial_path", lambda p: taken)
        with pytest.raises(FileWriteError, match=r"cannot write file '.*t\.h5': file exists") as info:
            write_table(path, {"a": np.arange(3)})
    assert info.value.errno == errno.EEXIST and taken.read_bytes() == b"someone else's"


def test_a_file_written_meanwhile_is_kept_unless_overwriting_was_asked(tmp_path):
    path = tmp_path / "t.h5"
    columns = {"event_index": np.arange(1000), "energy_kev": np.linspace(1, 8, 1000, dtype=np.float32)}
    from trackfit.io.table import TableWriter

    loser = TableWriter(path, expected_rows=1000, exact_rows=True)
    loser.append({k: v + 1 for k, v in columns.items()})
    write_table(path, columns)  # the other process finishes first
    with pytest.raises(FileWriteError, match="another process wrote .* while this one was writing it") as info:
        loser.close()
    assert info.value.errno == errno.EEXIST
    _same_rows(read_table(path), {k: np.asarray(v) for k, v in columns.items()})
    assert [p.name for p in tmp_path.iterdir()] == ["t.h5"]
    # asked to overwrite, the last writer replaces the file
    with TableWriter(path, overwrite=True) as writer:
        writer.append({k: v[:10] for k, v in columns.items()})
    assert len(read_table(path)) == 10 and [p.name for p in tmp_path.iterdir()] == ["t.h5"]


def test_stale_partial_files_of_dead_processes_are_removed(tmp_path):
    path = tmp_path / "t.h5"
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)  # a process that has ended
    stale = tmp_path / f"t.h5.{_partial._HOST}-{pid}-0123abcd.partial"
    other_host = tmp_path / f"t.h5.elsewhere-{pid}-0123abcd.partial"
    running = tmp_path / f"t.h5.{_partial._HOST}-{os.getppid()}-0123abcd.partial"
    old_style = tmp_path / "t.h5.partial"
    for p in (stale, other_host, running, old_style):
        p.write_bytes(b"x")
    assert partial_files(path) == sorted([stale, other_host, running, old_style])
    write_table(path, {"a": np.arange(3)})
    assert not stale.exists() and other_host.exists() and running.exists() and old_style.exists()


def test_text_files_commit_like_the_hdf5_writers(tmp_path):
    path = tmp_path / "summary.json"
    write_text_file(path, "one\n")
    write_text_file(path, "two\n")
    assert path.read_text() == "two\n" and [p.name for p in tmp_path.iterdir()] == ["summary.json"]
    with pytest.raises(FileExistsError):
        write_text_file(path, "three\n", overwrite=False)
    with pytest.raises(FileWriteError, match=r"folder '.*missing' does not exist"):
        write_text_file(tmp_path / "missing" / "s.json", "x")


def test_file_write_error_crosses_process_pools():
    err = FileWriteError("out.h5", "no space left on device", errno=errno.ENOSPC)
    back = pickle.loads(pickle.dumps(err))
    assert type(back) is FileWriteError and str(back) == str(err) == "cannot write file 'out.h5': no space left on " \
        "device"
    assert back.errno == errno.ENOSPC and back.path == "out.h5" and isinstance(back, OSError)
    # the causes follow the system's error numbers (the errno module is the outside reference)
    assert "file size limit" in str(_partial._write_error(Path("a"), OSError(errno.EFBIG, "File too large")))


# ------------------------------------------------------------------------------------------------ concurrent writers
_STALLED_RUN = """
import sys, time
from pathlib import Path
from trackfit import reconstruct_file

raw, out, flag, go = sys.argv[1:5]

def stall(n):  # after the first batch: say so, then wait until the other run has finished
    if not Path(flag).exists():
        Path(flag).touch()
        while not Path(go).exists():
            time.sleep(0.02)

try:
    reconstruct_file(raw, out, progress=stall, batch_size=256, threads=1)
except OSError as err:
    print(f"{type(err).__name__} errno={err.errno}: {err}", file=sys.stderr)
    sys.exit(3)
"""


def _wait_for(path: Path, process, seconds=180):
    deadline = time.monotonic() + seconds
    while not path.exists():
        assert process.poll() is None, process.communicate()
        assert time.monotonic() < deadline, f"{path} did not appear"
        time.sleep(0.02)


def test_concurrent_runs_to_one_output_the_loser_fails_clearly_and_the_winner_is_exact(tmp_path):
    raw = _raw(tmp_path, 3000)
    out = tmp_path / "out.h5"
    flag, go = tmp_path / "first-batch", tmp_path / "go"
    loser = subprocess.Popen([sys.executable, "-c", _STALLED_RUN, raw, out, flag, go], env=ENV,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(flag, loser)
        assert len(partial_files(out)) == 1 and not out.exists()  # the first run is writing its partial file
        winner = _trackfit("reconstruct", raw, "-o", out, "--no-progress", "--threads", "1")
        assert winner.returncode == 0, winner.stderr
    finally:
        go.touch()
        _, stderr = loser.communicate(timeout=300)
    assert loser.returncode == 3, stderr
    assert f"FileWriteError errno={errno.EEXIST}: cannot write file '{out}': another process wrote" in stderr
    # the winner's table is the table of a single run (before the fix: its first rows were zeros)
    _same_rows(read_table(out), read_table(reconstruct_file(raw, tmp_path / "single.h5", progress=False)))
    assert not partial_files(out)


# ------------------------------------------------------------------------------------------------ injected faults
def _failing_writes(budget, code):
    """Replaces the one write of the partial files: fails with ``code`` once ``budget`` bytes are written."""
    written = [0]

    def write_at(guarded, view, offset):
        if written[0] + len(view) > budget:
            raise OSError(code, os.strerror(code))
        written[0] += len(view)
        return os.pwrite(guarded.fd, view, offset)

    return write_at


def _write_raw(path):
    batch = toy_tracks(300, 1, roi_shape=(16, 16))
    with RawEventWriter(path, batch.grid) as writer:
        for k in range(0, 300, 100):
            writer.append(batch.select(np.arange(k, k + 100)))


def _write_table(path):
    write_table(path, {"event_index": np.arange(20_000), "energy_kev": np.ones(20_000, np.float32)})


def _write_calibration(path):
    from trackfit.analysis.calfile import Calibration
    from trackfit.analysis.spectrum import EnergyScale

    Calibration(energy_scale=EnergyScale(coefficients=(0.0, 1 / 3000.0))).save(path)


def _write_pixel_map(path):
    from trackfit import HexGrid
    from trackfit.io.pixelmap import PixelMap, SourceRun, write_pixel_map

    grid = HexGrid(n_columns=20, n_rows=12)
    ones = np.ones(grid.shape)
    write_pixel_map(path, PixelMap(grid=grid, pedestal_adc=400 * ones, pedestal_error_adc=0.1 * ones,
                                   noise_adc=2 * ones, noise_error_adc=0.1 * ones, occupancy=0 * ones,
                                   n_samples=np.full(grid.shape, 400), n_above=np.zeros(grid.shape, int),
                                   code=np.zeros(grid.shape, np.uint8), settings={}, statistics={},
                                   sources=(SourceRun(name="p.h5", fingerprint="crc32:roi=1", n_events=400,
                                                      trigger_mode="random", pedestal_subtracted=False),)))


def _write_response(path):
    from trackfit.response import _ResponseWriter

    with _ResponseWriter(path, overwrite=False) as writer:
        writer.file.create_dataset("per_energy/energy_kev", data=np.linspace(2, 8, 5000))


def _write_text(path):
    write_text_file(path, "x" * 10_000)


WRITERS = {"raw": _write_raw, "table": _write_table, "calibration": _write_calibration,
           "pixel map": _write_pixel_map, "response": _write_response}
CAUSES = {errno.ENOSPC: "no space left on device", errno.EFBIG: "file size limit reached",
          errno.EDQUOT: "disk quota exceeded", errno.EIO: "input/output error"}


@pytest.mark.parametrize("kind", sorted(WRITERS))
@pytest.mark.parametrize("budget", [0, 3000, 60_000])
@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EFBIG])
def test_every_writer_reports_a_failed_write_and_leaves_nothing(tmp_path, monkeypatch, kind, budget, code):
    path = tmp_path / "out.h5"
    WRITERS[kind](tmp_path / "whole.h5")  # without faults: the size the file needs
    needed = (tmp_path / "whole.h5").stat().st_size
    (tmp_path / "whole.h5").unlink()
    monkeypatch.setattr(_partial._GuardedFile, "_write_at", _failing_writes(budget, code))
    if budget >= needed:
        WRITERS[kind](path)
        assert [p.name for p in tmp_path.iterdir()] == ["out.h5"]
        return
    with pytest.raises(FileWriteError) as info:
        WRITERS[kind](path)
    assert str(info.value) == f"cannot write file '{path}': {CAUSES[code]}" and info.value.errno == code
    assert list(tmp_path.iterdir()) == []  # no partial file, no final file


def test_text_writer_reports_a_full_disk(tmp_path, monkeypatch):
    monkeypatch.setattr(_partial._GuardedFile, "_write_at", _failing_writes(5000, errno.ENOSPC))
    with pytest.raises(FileWriteError, match="no space left on device"):
        _write_text(tmp_path / "s.json")
    assert list(tmp_path.iterdir()) == []


@settings(max_examples=25, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(budget=st.integers(0, 400_000), code=st.sampled_from(sorted(CAUSES)))
def test_a_table_is_either_exact_or_refused_whatever_the_point_of_failure(tmp_path_factory, budget, code):
    folder = tmp_path_factory.mktemp("faults")
    columns = {"event_index": np.arange(30_000), "time_s": np.linspace(0, 1, 30_000),
               "status": np.zeros(30_000, np.uint16)}
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_partial._GuardedFile, "_write_at", _failing_writes(budget, code))
        try:
            write_table(folder / "t.h5", columns, chunk_rows=4096)
        except FileWriteError as err:
            assert err.errno == code and CAUSES[code] in str(err)
            assert list(folder.iterdir()) == []
            return
    _same_rows(read_table(folder / "t.h5"), columns)  # every write went through: the table is exact


# ------------------------------------------------------------------------------------------------ unwritable targets
@pytest.mark.parametrize("kind", sorted(WRITERS))
@pytest.mark.parametrize("code, cause", [(errno.EACCES, "permission denied"), (errno.EROFS, "read-only file system")])
def test_every_writer_reports_an_unwritable_folder(tmp_path, monkeypatch, kind, code, cause):
    def refuse(path):
        raise OSError(code, os.strerror(code), str(path))

    monkeypatch.setattr(_partial, "_open_exclusive", refuse)
    with pytest.raises(FileWriteError, match=f"cannot write file '.*out.h5': {cause}"):
        WRITERS[kind](tmp_path / "out.h5")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("kind", sorted(WRITERS))
def test_every_writer_reports_a_missing_folder_or_a_folder_in_the_way(tmp_path, kind):
    with pytest.raises(FileWriteError, match=r"cannot write file '.*out\.h5': folder '.*nowhere' does not exist"):
        WRITERS[kind](tmp_path / "nowhere" / "out.h5")
    (tmp_path / "dir.h5").mkdir()
    with pytest.raises((FileWriteError, FileExistsError)):
        WRITERS[kind](tmp_path / "dir.h5")
    assert [p.name for p in tmp_path.iterdir()] == ["dir.h5"] and not any((tmp_path / "dir.h5").iterdir())


def test_a_read_only_folder_for_real(tmp_path):
    """A real read-only target: a folder without write permission (as root, which ignores it: a read-only tmpfs in
    a user namespace)."""
    raw = _raw(tmp_path, 200)
    if os.geteuid() != 0:
        target = tmp_path / "locked"
        target.mkdir()
        target.chmod(0o555)
        try:
            result = _trackfit("reconstruct", raw, "-o", target / "out.h5", "--no-progress")
        finally:
            target.chmod(0o755)
        _assert_one_line_error(result, f"cannot write file '{target / 'out.h5'}': permission denied")
        return
    if not _user_namespaces():
        pytest.skip("running as root without user namespaces: no read-only target to be had")
    target = tmp_path / "ro"
    target.mkdir()
    script = (f"mount -t tmpfs -o size=1m,ro tmpfs {target} && exec {sys.executable} -m trackfit reconstruct {raw} "
              f"-o {target / 'out.h5'} --no-progress")
    result = subprocess.run(["unshare", "-rm", "sh", "-c", script], env=ENV, capture_output=True, text=True,
                            timeout=300)
    _assert_one_line_error(result, f"cannot write file '{target / 'out.h5'}': read-only file system")


# ------------------------------------------------------------------------------------------------ real full disk, limit
def test_a_file_size_limit_gives_a_clear_error_and_no_partial_file(tmp_path):
    raw = _raw(tmp_path, 3000)
    out = tmp_path / "out" / "t.h5"
    out.parent.mkdir()
    # before the fix: exit status -11 (a segmentation fault in the close of the partial file)
    result = _trackfit("reconstruct", raw, "-o", out, "--no-progress", preexec_fn=_file_size_limit(200_000))
    _assert_one_line_error(result, f"cannot write file '{out}': file size limit reached")
    assert list(out.parent.iterdir()) == []


def test_a_full_disk_gives_a_clear_error_and_no_partial_file(tmp_path):
    if not _user_namespaces():
        pytest.skip("no user namespaces here: a small tmpfs cannot be mounted without root")
    raw = _raw(tmp_path, 3000)  # about 350 kB of table
    disk = tmp_path / "disk"
    disk.mkdir()
    script = (f"mount -t tmpfs -o size=128k tmpfs {disk} && {sys.executable} -m trackfit reconstruct {raw} "
              f"-o {disk / 'out.h5'} --no-progress; status=$?; echo left: $(ls -A {disk}) >&2; exit $status")
    result = subprocess.run(["unshare", "-rm", "sh", "-c", script], env=ENV, capture_output=True, text=True,
                            timeout=300)
    _assert_one_line_error(result, f"cannot write file '{disk / 'out.h5'}': no space left on device")
    assert result.stderr.rstrip().endswith("left:")  # nothing left on the full disk


@pytest.mark.slow
def test_simulate_and_calibrate_under_a_file_size_limit(tmp_path):
    raw = tmp_path / "sim.h5"
    result = _trackfit("simulate", "--preset", "hedme-1atm-1cm", "-n", "400", "-o", raw, "--seed", "3",
                       "--energy-kev", "5.9", "--no-progress", preexec_fn=_file_size_limit(100_000))
    _assert_one_line_error(result, f"cannot write file '{raw}': file size limit reached")
    assert list(tmp_path.iterdir()) == []
    assert _trackfit("simulate", "--preset", "hedme-1atm-1cm", "-n", "3000", "-o", raw, "--seed", "3",
                     "--energy-kev", "5.9", "--no-progress").returncode == 0
    table = tmp_path / "t.h5"
    assert _trackfit("reconstruct", raw, "-o", table, "--no-progress").returncode == 0
    cal = tmp_path / "cal.h5"
    result = _trackfit("calibrate", "-o", cal, "--unpolarized", table, preexec_fn=_file_size_limit(2000))
    _assert_one_line_error(result, f"cannot write file '{cal}': file size limit reached")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["sim.h5", "t.h5"]


# ------------------------------------------------------------------------------------------------ kill -9 and rerun
_STOPPED_RUN = """
import sys, time
from pathlib import Path
from trackfit import reconstruct_file

raw, out, flag, when = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
done = [0]

def stop(n):  # once `when` events are done: say so and wait to be killed
    done[0] += n
    if done[0] >= when:
        Path(flag).touch()
        time.sleep(600)

reconstruct_file(raw, out, progress=stop, batch_size=256, threads=1)
"""


@pytest.mark.parametrize("when", [1, pytest.param(1500, marks=pytest.mark.slow),
                                  pytest.param(3000, marks=pytest.mark.slow)])  # first batch, half-way, last batch
def test_kill_9_leaves_no_complete_looking_file_and_a_rerun_gives_the_exact_table(tmp_path, when):
    raw = _raw(tmp_path, 3000)
    out = tmp_path / "out.h5"
    flag = tmp_path / "stopped"
    run = subprocess.Popen([sys.executable, "-c", _STOPPED_RUN, raw, out, flag, str(when)], env=ENV)
    try:
        _wait_for(flag, run)
    finally:
        run.send_signal(signal.SIGKILL)
        run.wait()
    assert not out.exists() and len(partial_files(out)) == 1  # only the dead run's partial file
    rerun = _trackfit("reconstruct", raw, "-o", out, "--no-progress")
    assert rerun.returncode == 0, rerun.stderr
    _same_rows(read_table(out), read_table(reconstruct_file(raw, tmp_path / "single.h5", progress=False)))
    assert not partial_files(out)  # the rerun removed the dead run's partial file


@pytest.mark.slow
def test_kill_9_of_the_command_at_any_moment(tmp_path):
    """``trackfit reconstruct`` killed as soon as its partial file appears: either no table, or the exact one."""
    raw = _raw(tmp_path, 3000)
    out = tmp_path / "out.h5"
    run = subprocess.Popen([sys.executable, "-m", "trackfit", "reconstruct", raw, "-o", out, "--no-progress",
                            "--batch-size", "64", "--threads", "1"], env=ENV)
    deadline = time.monotonic() + 180
    while not partial_files(out) and run.poll() is None and time.monotonic() < deadline:
        time.sleep(0.002)
    run.send_signal(signal.SIGKILL)
    run.wait()
    reference = read_table(reconstruct_file(raw, tmp_path / "single.h5", progress=False))
    if out.exists():  # the run ended before the kill
        _same_rows(read_table(out), reference)
        return
    assert _trackfit("reconstruct", raw, "-o", out, "--no-progress").returncode == 0
    _same_rows(read_table(out), reference)
    assert not partial_files(out)


# ------------------------------------------------------------------------------------------------ no events
def test_a_raw_file_of_no_events_gives_an_empty_table_with_every_column(tmp_path, capsys):
    grid_batch = toy_tracks(5, 2, roi_shape=(16, 16))
    empty = grid_batch.select(np.arange(0))
    raw = tmp_path / "empty.h5"
    with RawEventWriter(raw, grid_batch.grid, run_info={"nominal_counts_per_kev": 2500.0}) as writer:
        writer.append(empty)
    # the in-memory path is the reference: the same columns, in the same order, with the same dtypes
    expected = reconstruct(empty)
    table = read_table(reconstruct_file(raw, tmp_path / "lib.h5", progress=False))
    assert len(table) == 0 and len(expected) == 0
    assert list(table) == list(expected) and "truth_angle_rad" in table
    assert {k: table[k].dtype for k in table} == {k: expected[k].dtype for k in expected}
    nonempty = read_table(reconstruct_file(_raw(tmp_path, 10), tmp_path / "ten.h5", progress=False))
    assert {k: table[k].dtype for k in table} == {k: nonempty[k].dtype for k in nonempty}
    assert table.provenance["input_n_events"] == 0 and table.provenance["input_fingerprint"].startswith("crc32:")
    # the command line: a valid output (before the fix: a table without columns, on which the command failed), and
    # clear messages from the commands that read it
    from trackfit.cli import main

    out = tmp_path / "cli.h5"
    capsys.readouterr()
    assert main(["reconstruct", str(raw), "-o", str(out), "--no-progress"]) == 0
    assert "0 events" in capsys.readouterr().out
    assert list(read_table(out)) == list(table)
    assert main(["info", str(out)]) == 0 and "0 rows" in capsys.readouterr().out
    for command in (["calibrate", "-o", str(tmp_path / "cal.h5"), "--unpolarized", str(out)],
                    ["polarization", str(out), "--modulation-factor", "0.3"]):
        assert main(command) == 2
        assert "no events left" in capsys.readouterr().err
    assert not (tmp_path / "cal.h5").exists()
