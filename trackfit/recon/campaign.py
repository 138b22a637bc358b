"""Resumable reconstruction campaigns: what may be skipped, and the campaign summary file of an output folder.

``trackfit reconstruct RAW... --out-dir DIR --resume`` skips every output that is complete and was made from the
same input (content fingerprint), the same settings (settings hash, :mod:`trackfit.recon.identity`) and a
compatible trackfit version, and redoes the rest, saying for each file why (:func:`resume_decision`). Files split
into parts by an interrupted run keep their complete parts (:mod:`trackfit.recon.parts`).

Every run into an output folder keeps ``DIR/trackfit-campaign.json`` up to date (:class:`CampaignSummary`): each
input with its output, state, reason, input fingerprint, settings hash, status counts and timings, rewritten (by an
atomic rename) as files finish, so an interrupted campaign can be inspected. The layout is ours, described in
``docs/table-format.md`` ("Campaign summary").
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..io._partial import now_utc, partial_files, write_text_file
from .identity import SETTINGS_HASH_KEY, compatible_version

__all__ = ["SUMMARY_NAME", "SUMMARY_LAYOUT", "ResumeDecision", "resume_decision", "CampaignSummary",
           "table_status_counts"]

#: file name of the campaign summary in an output folder
SUMMARY_NAME = "trackfit-campaign.json"
#: value of the summary's ``layout`` entry (bumped when the layout changes)
SUMMARY_LAYOUT = "trackfit-campaign 1"


@dataclass(frozen=True)
class ResumeDecision:
    """Whether an output can be kept (``skip``) and why; ``fingerprint`` is the input's content fingerprint when it
    was computed."""

    skip: bool
    reason: str
    fingerprint: str = ""


def _provenance(path: Path) -> dict:
    from ..io.table import read_table

    return read_table(path, columns=[]).provenance


def resume_decision(raw_path, out_path, *, settings: str, n_events: int) -> ResumeDecision:
    """Decide whether the existing table ``out_path`` of ``raw_path`` may be kept.

    Parameters
    ----------
    settings : str
        The settings hash the run would write (:func:`trackfit.recon.identity.settings_hash`).
    n_events : int
        Events of the raw file.

    The cheap checks (the table is complete and readable, version, settings hash, input size and event count) come
    first; the input's content fingerprint is computed (one read of the raw file, no reconstruction) only when they
    all pass.
    """
    from .. import __version__
    from ..io.fingerprint import content_fingerprint

    raw_path, out_path = Path(raw_path), Path(out_path)
    if not out_path.exists():
        from .parts import parts_folder

        folder = parts_folder(out_path)
        n_parts = len(list(folder.glob("events_*.h5"))) if folder.is_dir() else 0
        return ResumeDecision(False, "no output yet" + (" (an interrupted run left a partial file)"
                                                        if partial_files(out_path) else "")
                              + (f" ({n_parts} complete part(s) of an interrupted run are kept if they match)"
                                 if n_parts else ""))
    try:
        provenance = _provenance(out_path)
    except (ValueError, OSError) as err:
        return ResumeDecision(False, f"the output cannot be read ({err})")
    version = str(provenance.get("trackfit_version", ""))
    if not compatible_version(version):
        return ResumeDecision(False, f"made by trackfit {version or '(unknown)'}, not compatible with {__version__} "
                                     "(a different major.minor release)")
    if provenance.get(SETTINGS_HASH_KEY) != settings:
        made = provenance.get(SETTINGS_HASH_KEY) or "none recorded"
        return ResumeDecision(False, f"made with other settings (settings hash {made}, this run {settings})")
    size = Path(raw_path).stat().st_size
    if provenance.get("input_size_bytes") != size or provenance.get("input_n_events") != n_events:
        return ResumeDecision(False, f"the input changed: {provenance.get('input_n_events')} events and "
                                     f"{provenance.get('input_size_bytes')} bytes then, {n_events} and {size} now")
    fingerprint = content_fingerprint(raw_path)
    if provenance.get("input_fingerprint") != fingerprint:
        return ResumeDecision(False, "the input's content changed (input fingerprint differs)", fingerprint)
    return ResumeDecision(True, "complete, made from the same input fingerprint with the same settings by a "
                                f"compatible version (trackfit {version})", fingerprint)


def table_status_counts(path) -> dict:
    """Status counts of a table: rows, fully reconstructed, usable with warnings only, failed, malformed input."""
    from ..io.table import read_table
    from .status import FAILURE_BITS, Status

    status = np.asarray(read_table(path, ["status"])["status"], dtype=np.int64)
    failed = (status & int(FAILURE_BITS)) != 0
    return {"rows": int(status.size), "fully_reconstructed": int(np.count_nonzero(status == 0)),
            "warnings_only": int(np.count_nonzero((status != 0) & ~failed)), "failed": int(np.count_nonzero(failed)),
            "malformed_input": int(np.count_nonzero(status & int(Status.MALFORMED_INPUT)))}


class CampaignSummary:
    """The campaign summary file of an output folder (``trackfit-campaign.json``), kept up to date.

    Parameters
    ----------
    folder : str or Path
        The output folder.
    config_toml : str
        The settings of this run (each file's settings hash is in its entry).
    inputs : sequence of (raw_path, out_path)
        The files of this run (entries of files of earlier runs that are not among them are kept).

    Entries of ``files`` (one per input, in the order they were first given): ``input``, ``output``, ``state``
    (``pending``, ``running``, ``done``, ``skipped``, ``failed``), ``reason`` (why skipped or redone),
    ``input_fingerprint``, ``input_size_bytes``, ``n_events``, ``settings_hash``, ``status_counts``
    (:func:`table_status_counts`), ``seconds``, ``events_per_s``, ``n_parts``, ``n_parts_reused``, ``error``,
    ``finished_utc``. ``runs`` lists each invocation (start, end, resume or not, files skipped, done and failed).
    """

    def __init__(self, folder, *, config_toml: str, inputs, resume: bool):
        from .. import __version__

        self.path = Path(folder) / SUMMARY_NAME
        data = {}
        if self.path.exists():
            try:
                data = json.loads(self.path.read_text())
            except (OSError, ValueError):
                data = {}
            if data.get("layout") != SUMMARY_LAYOUT:
                data = {}
        files = {entry["input"]: entry for entry in data.get("files", [])}
        for raw, out in inputs:
            key = str(Path(raw).resolve())
            entry = files.setdefault(key, {"input": key})
            entry.update(output=str(Path(out).resolve()), state="pending", reason="", error="")
        self.data = {"layout": SUMMARY_LAYOUT, "trackfit_version": __version__,
                     "created_utc": data.get("created_utc", now_utc()), "updated_utc": now_utc(),
                     "config_toml": config_toml,
                     "runs": data.get("runs", []) + [{"started_utc": now_utc(), "resume": bool(resume)}],
                     "files": list(files.values())}
        self._by_input = {entry["input"]: entry for entry in self.data["files"]}
        self.write()

    def update(self, raw_path, **values) -> None:
        """Change the entry of ``raw_path`` and rewrite the file."""
        entry = self._by_input[str(Path(raw_path).resolve())]
        entry.update({k: v for k, v in values.items()})
        self.write()

    def record_table(self, raw_path, out_path, *, state: str, reason: str = "", seconds: float | None = None,
                     n_parts: int = 1, n_parts_reused: int = 0) -> None:
        """Fill an entry from a complete table: fingerprint, settings hash, status counts (and timings)."""
        provenance = _provenance(Path(out_path))
        counts = table_status_counts(out_path)
        values = {"state": state, "reason": reason, "error": "",
                  "input_fingerprint": provenance.get("input_fingerprint", ""),
                  "input_size_bytes": provenance.get("input_size_bytes"),
                  "n_events": provenance.get("input_n_events"),
                  SETTINGS_HASH_KEY: provenance.get(SETTINGS_HASH_KEY, ""), "status_counts": counts,
                  "table_finished_utc": provenance.get("finished_utc", "")}
        if seconds is not None:
            values.update(seconds=round(float(seconds), 3), n_parts=int(n_parts), n_parts_reused=int(n_parts_reused),
                          events_per_s=round(counts["rows"] / seconds, 1) if seconds > 0 else None,
                          finished_utc=now_utc())
        self.update(raw_path, **values)

    def finish_run(self) -> None:
        """Close this invocation's entry in ``runs`` with its counts."""
        states = [entry["state"] for entry in self.data["files"]]
        self.data["runs"][-1].update(finished_utc=now_utc(), **{f"n_{s}": states.count(s) for s in
                                                                 ("done", "skipped", "failed", "pending")})
        self.write()

    def write(self) -> None:
        self.data["updated_utc"] = now_utc()
        write_text_file(self.path, json.dumps(self.data, indent=2) + "\n")
