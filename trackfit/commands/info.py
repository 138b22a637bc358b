"""``trackfit info FILE``: what a trackfit file holds.

Dispatches on the file's root attribute ``trackfit_format``: a raw event file (geometry, events, time span, ROI
sizes, pulse heights, energy scale, layout check), an event table (:meth:`EventTable.summary`: rows, status,
energy scale, per-column statistics, provenance), a calibration file (the calibration's own summary: each part
with its runs), a pixel map (codes, noise and pedestal distributions, source runs) or a detector response
(``trackfit response``: the design, how the response was made and its energy grid). ``--json`` prints the
same as JSON for each kind.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..cli import CommandError
from ..io.errors import FileFormatError
from ..io.kinds import KINDS as _KNOWN
from ..io.kinds import check_before_open, open_file
from ..io.probe import DEFAULT_TIMEOUT_S, probe_structure

#: file kinds ``trackfit info`` knows, by their ``trackfit_format`` attribute
KINDS = tuple(_KNOWN)


def register(subparsers):
    parser = subparsers.add_parser(
        "info", help="summarise a raw event file, an event table, a calibration file, a pixel map or a detector "
        "response",
        description="Print what a trackfit file holds. Raw event files: geometry, event count, time span, "
        "ROI-size and pulse-height summaries, energy scale, and a check of every event's layout. Event tables: "
        "rows, status, energy scale (uncalibrated energies are marked), per-column min/max/mean/NaN and where "
        "the table comes from. Calibration files: each part with its summary and input runs. Pixel maps: counts of "
        "each bad-pixel code, noise and pedestal distributions, samples and source runs. Detector responses: the "
        "design, how the response was made and its energy grid.")
    parser.add_argument("file", help="a trackfit HDF5 file (raw events, event table, calibration, pixel map or "
                        "response)")
    parser.add_argument("--max-events", type=int, default=None, metavar="N",
                        help="summarise only the first N events (rows of a table) (default: all)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    parser.add_argument("--open-timeout", type=float, default=DEFAULT_TIMEOUT_S, metavar="SECONDS",
                        help="seconds the HDF5 library may take to read the file's structure (in a separate "
                        "process) before the file is refused as damaged")
    parser.add_argument("--allow-external-storage", action="store_true",
                        help="read data the file takes from other files (HDF5 external links, external storage, "
                        "virtual datasets); refused unless given, so that a file cannot make trackfit read another "
                        "one unnoticed")
    parser.set_defaults(func=run)


def file_header(path, *, allow_external: bool = False) -> dict:
    """The root attributes of a file as plain values, read through the checks every reader makes (a regular file,
    HDF5, sound global heaps, no data in other files unless allowed); errors name the file."""
    f, attrs = open_file(path, what="file", error=FileFormatError, allow_external=allow_external)
    f.close()
    return attrs


def file_kind(path, *, allow_external: bool = False) -> str:
    """The ``trackfit_format`` root attribute of a file; errors name the file and say what was expected."""
    kind = file_header(path, allow_external=allow_external).get("trackfit_format")
    if not isinstance(kind, str) or kind not in KINDS:
        found = "no trackfit_format attribute" if kind is None else f"trackfit_format {kind!r}"
        raise CommandError(f"'{path}' is not a trackfit file this version knows: expected a root attribute "
                           f"trackfit_format of {list(KINDS)}, found {found}")
    return kind


def run(args) -> int:
    if args.max_events is not None and args.max_events < 1:
        raise CommandError(f"--max-events must be >= 1 (got {args.max_events})")
    if not args.open_timeout > 0:
        raise CommandError(f"--open-timeout must be > 0 seconds (got {args.open_timeout})")
    # users point info at anything: the file's structure is first read in a child process with a time limit
    check_before_open(args.file, what="file", error=FileFormatError)
    probe_structure(args.file, error=FileFormatError, timeout_s=args.open_timeout)
    kind = file_kind(args.file, allow_external=args.allow_external_storage)
    if kind == "raw-events":
        from ..io.summary import summarize_raw

        summary = summarize_raw(args.file, max_events=args.max_events, allow_external=args.allow_external_storage)
        print(json.dumps(summary.as_dict(), indent=2, default=_json_value) if args.json else summary.as_text())
    elif kind == "event-table":
        _table(args)
    elif kind == "pixel-map":
        from ..io.pixelmap import read_pixel_map

        pixel_map = read_pixel_map(args.file, allow_external=args.allow_external_storage)
        print(json.dumps(pixel_map.summary(), indent=2, default=_json_value) if args.json
              else pixel_map.summary_text())
    elif kind == "response":
        _response(args)
    else:
        _calibration(args)
    return 0


def _header(args) -> dict:
    return file_header(args.file, allow_external=args.allow_external_storage)


def _json_value(value):
    """JSON form of what ``json`` does not know: arrays and numpy numbers as their values, the rest as text."""
    if hasattr(value, "tolist"):
        return value.tolist()
    return str(value)


def _file_lines(path, header) -> list[str]:
    size = Path(path).stat().st_size
    return [f"file          {path} ({size / 1e6:.2f} MB)",
            f"format        {header.get('trackfit_format')} v{header.get('format_version')}, written by "
            f"{header.get('created_by')} at {header.get('created_utc')}"]


def _short(value) -> str:
    text = str(value)
    if "\n" in text:
        return f"({len(text.splitlines())} lines of text)"
    return text if len(text) <= 70 else text[:66] + " ..."


def _table(args) -> None:
    from ..io.table import read_table

    table = read_table(args.file, stop=args.max_events, allow_external=args.allow_external_storage)
    header = _header(args)
    provenance = table.provenance
    if args.json:
        print(json.dumps({"path": str(args.file), "file_size_bytes": Path(args.file).stat().st_size,
                          "header": header, "n_rows_read": len(table), "summary": table.summary_dict(),
                          "provenance": provenance}, indent=2, default=_json_value))
        return
    lines = _file_lines(args.file, header)
    if args.max_events is not None:
        lines.append(f"rows          the first {len(table)} rows (--max-events)")
    lines.append(table.summary())
    width = max((len(key) for key in provenance), default=0)
    lines += [f"provenance    {key:<{width}} = {_short(value)}" for key, value in provenance.items()]
    print("\n".join(lines))


def _calibration(args) -> None:
    from ..analysis import Calibration

    calibration = Calibration.load(args.file, allow_external=args.allow_external_storage)
    header = _header(args)
    if args.json:
        parts = {name: {"summary": repr(getattr(calibration, name)),
                        "provenance": calibration.provenance.get(name, {})} for name in calibration.parts()}
        print(json.dumps({"path": str(args.file), "file_size_bytes": Path(args.file).stat().st_size,
                          "header": header, "parts": parts}, indent=2, default=_json_value))
        return
    print("\n".join([*_file_lines(args.file, header), repr(calibration)]))


def _response(args) -> None:
    from ..response import DetectorResponse

    response = DetectorResponse.load(args.file, allow_external=args.allow_external_storage)
    header = _header(args)
    if args.json:
        print(json.dumps({"path": str(args.file), "file_size_bytes": Path(args.file).stat().st_size,
                          "header": header, **response.summary_dict()}, indent=2, default=_json_value))
        return
    print("\n".join([*_file_lines(args.file, header), response.summary()]))
