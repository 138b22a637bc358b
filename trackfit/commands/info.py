"""``trackfit info FILE``: what a raw event file holds (geometry, events, time span, ROI sizes, pulse heights)."""

from __future__ import annotations

import json


def register(subparsers):
    parser = subparsers.add_parser(
        "info", help="summarise a raw event file",
        description="Print the geometry, event count, time span, ROI-size and pulse-height summaries of a raw "
        "event file, and check every event's layout.")
    parser.add_argument("file", help="raw event file (HDF5, trackfit raw-events format)")
    parser.add_argument("--max-events", type=int, default=None, metavar="N",
                        help="scan only the first N events for the summaries (default: all)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    parser.set_defaults(func=run)


def run(args) -> int:
    from ..io.summary import summarize_raw

    summary = summarize_raw(args.file, max_events=args.max_events)
    print(json.dumps(summary.as_dict(), indent=2) if args.json else summary.as_text())
    return 0
