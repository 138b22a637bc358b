"""``trackfit reconstruct RAW... (-o OUT | --out-dir DIR) [--resume]``: raw event files to event tables.

With one worker the files run one after the other in this process with kernel threads; with ``--workers N`` they
run in a process pool started with the ``spawn`` method (numba's threading layers may hang in a forked child), large
files split into event ranges whose parts are joined (:mod:`trackfit.recon.parts`); with ``--scheduler`` they run as
tasks of a Dask distributed cluster. One progress bar counts the events of all files. With ``--out-dir`` the
campaign summary ``trackfit-campaign.json`` of the folder is kept up to date; ``--resume`` skips the outputs that
are complete and made from the same input and settings (:mod:`trackfit.recon.campaign`).
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

from ..cli import CommandError

#: events per batch when --batch-size is not given (trackfit.recon.DEFAULT_BATCH_SIZE, checked by a test; kept
#: here so that building the parser does not import the reconstruction)
DEFAULT_BATCH_SIZE = 32_768


class _PrintSettings(argparse.Action):
    """``--print-settings``: print every setting with its default as a commented TOML file and exit."""

    def __init__(self, option_strings, dest, **kwargs):
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        from ..recon import ReconConfig

        print(ReconConfig().settings_template(), end="")
        parser.exit()


def register(subparsers):
    parser = subparsers.add_parser(
        "reconstruct", help="reconstruct raw event files into event tables",
        description="Clean each event (threshold, bad pixels, main cluster) and run the two-stage moment "
        "analysis: energy, conversion point and emission angle of every event, one table row per input event "
        "(docs/table-format.md); by default also the adaptive estimate of the conversion point and emission "
        "angle, which the analysis then uses (its adaptive_* columns; --estimator two-stage for the classic "
        "analysis alone, docs/methods.md section 11). Energies in keV need the detector's ADC counts per keV: "
        "counts_per_kev in --config, else the raw file's nominal scale (simulated files); without either the table "
        "is marked uncalibrated.")
    parser.add_argument("raw", nargs="+", metavar="RAW", help="raw event file(s)")
    out = parser.add_mutually_exclusive_group(required=True)
    out.add_argument("-o", "--output", metavar="OUT",
                     help="event-table file to write (one RAW only; -o or --out-dir is required)")
    out.add_argument("--out-dir", metavar="DIR",
                     help="folder for the tables, named <raw stem>_events.h5 (-o or --out-dir is required)")
    parser.add_argument("--config", metavar="TOML",
                        help="reconstruction settings (trackfit.ReconConfig keys; default: the built-in settings, "
                        "see --print-settings)")
    parser.add_argument("--print-settings", action=_PrintSettings,
                        help="print every setting with its default as a commented TOML settings file and exit "
                        "(save it, edit it, pass it to --config)")
    parser.add_argument("--pixel-map", metavar="MAP.h5",
                        help="pixel map (trackfit pixel-map): subtract its pedestals from files that are not "
                        "pedestal-subtracted and ignore its hot, dead and noisy pixels (overrides the config's; "
                        "default: the config's, none)")
    parser.add_argument("--threshold-noise-rms", type=float, metavar="K",
                        help="cut each pixel at K times its own noise from the pixel map instead of one ADC value "
                        "(default: the config's threshold_noise_rms, 0 = off)")
    parser.add_argument("--estimator", choices=("two-stage", "adaptive", "skeleton"),
                        help="emission-angle estimate the tables offer to the analysis (overrides the config's "
                        "emission_estimator; default: the config's, adaptive unless it says otherwise); the "
                        "two-stage columns are always written")
    parser.add_argument("--workers", type=int, default=1, metavar="N",
                        help="processes reconstructing files (or event ranges of large files) in parallel "
                        "(default 1: this process, with kernel threads); a process takes about 1.5 s to start, so "
                        "more than one pays off for many files or files of millions of events")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="run the files as tasks of a Dask distributed cluster, large files as event-range tasks "
                        "joined by this process: a scheduler address (tcp://host:8786) or 'local'; every worker must "
                        "see the paths (needs trackfit[dask]; default: no cluster, processes on this machine)")
    parser.add_argument("--part-events", type=int, default=None, metavar="N",
                        help="with --workers > 1 or --scheduler: events per range of a split file (default: files "
                        "of more than 1 000 000 events are split into ranges of about that size, and fewer files "
                        "than workers are split so that every worker has work)")
    parser.add_argument("--resume", action="store_true",
                        help="with --out-dir: skip the outputs that are complete and were made from the same input "
                        "(content fingerprint), settings and a compatible trackfit version, redo the others, keep "
                        "the complete parts of an interrupted split file, and say why for each file")
    parser.add_argument("--threads", type=int, default=None, metavar="N",
                        help="kernel threads per file (default: all CPUs with one worker, 1 with several)")
    parser.add_argument("--batch-size", type=int, default=None, metavar="N",
                        help=f"events per batch; memory grows with it (default {DEFAULT_BATCH_SIZE})")
    parser.add_argument("--strict", action="store_true",
                        help="stop at the first malformed event instead of flagging it")
    parser.add_argument("--skip-truth", action="store_true",
                        help="do not copy the simulation truth of simulated raw files into the tables (the truth_* "
                        "columns); it stays in the raw file, whose event i is row i of the table (default: copy it)")
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")
    parser.set_defaults(func=run)


def _jobs(args):
    raws = [Path(p) for p in args.raw]
    for raw in raws:
        if not raw.exists():
            raise FileNotFoundError(f"raw event file '{raw}' does not exist")
    if args.output is not None:
        if len(raws) != 1:
            raise CommandError(f"-o/--output takes one RAW file (got {len(raws)}); use --out-dir for several")
        from ..io.whole_files import check_output_file

        outs = [check_output_file(args.output, flag="-o/--output", overwrite=True)]
    else:
        from ..io.whole_files import make_output_folder
        from ..recon.pipeline import output_name

        out_dir = make_output_folder(args.out_dir, flag="--out-dir")
        outs = [output_name(raw, out_dir) for raw in raws]
        seen = {}
        for raw, out in zip(raws, outs, strict=True):
            if out in seen:
                raise CommandError(f"'{raw}' and '{seen[out]}' would both be written to '{out}'")
            seen[out] = raw
    if not args.overwrite and not args.resume:
        for out in outs:
            if out.exists():
                raise FileExistsError(f"'{out}' exists; pass --overwrite to replace it, or --resume to keep it when "
                                      "it is complete and up to date")
    return list(zip(raws, outs, strict=True))


def _summary(out) -> str:
    import numpy as np

    from ..io.table import read_table

    table = read_table(out, ["status"])
    status = table["status"]
    n = len(status)
    ok = int(np.count_nonzero(status == 0))
    malformed = table.provenance.get("n_malformed_events", 0)
    share = f"{100.0 * ok / n:.1f} %" if n else "-"
    return (f"wrote {out}: {n} events, {ok} fully reconstructed ({share}), {malformed} malformed; "
            f"{_scale_note(table.provenance)}")


def _scale_note(provenance) -> str:
    from ..io.energy_label import SCALE_KEY, energy_scale_source

    source = energy_scale_source(provenance)
    value = provenance.get(SCALE_KEY)
    if source == "none":
        return ("energy_kev UNCALIBRATED (no counts_per_kev in the settings or the raw file; calibrate with "
                "trackfit calibrate, or set counts_per_kev in --config)")
    return f"energy scale {value:.6g} ADC counts per keV from the {source}"


def _with_pixel_map(config, args):
    """The config with --pixel-map and --threshold-noise-rms applied; the map is read once here to check it."""
    from dataclasses import replace

    from ..io.pixelmap import read_pixel_map

    changes = {}
    if args.pixel_map is not None:
        if not Path(args.pixel_map).exists():
            raise FileNotFoundError(f"--pixel-map: pixel map '{args.pixel_map}' does not exist")
        changes["pixel_map"] = str(Path(args.pixel_map).resolve())
    if args.threshold_noise_rms is not None:
        if args.threshold_noise_rms < 0:
            raise CommandError(f"--threshold-noise-rms must be >= 0 (got {args.threshold_noise_rms:g})")
        changes["threshold_noise_rms"] = args.threshold_noise_rms
    try:
        config = replace(config, **changes)
    except ValueError as err:
        raise CommandError(str(err).replace("'threshold_noise_rms'", "--threshold-noise-rms")
                           .replace("a 'pixel_map'", "a pixel map (--pixel-map)")) from None
    if config.pixel_map:
        read_pixel_map(config.pixel_map)  # a bad map is reported before any file is touched
    return config


def run(args) -> int:
    from ..io.raw import open_raw
    from ..recon import ReconConfig

    if args.workers < 1:
        raise CommandError(f"--workers must be >= 1 (got {args.workers})")
    if args.batch_size is not None and args.batch_size < 1:
        raise CommandError(f"--batch-size must be >= 1 (got {args.batch_size})")
    if args.threads is not None and args.threads < 1:
        raise CommandError(f"--threads must be >= 1 (got {args.threads})")
    if args.part_events is not None and args.part_events < 1:
        raise CommandError(f"--part-events must be >= 1 (got {args.part_events})")
    if args.resume and args.out_dir is None:
        raise CommandError("--resume needs --out-dir DIR (the folder whose outputs and campaign summary it resumes)")
    if args.resume and args.overwrite:
        raise CommandError("--resume keeps complete outputs and --overwrite replaces them: give one of the two")
    config = ReconConfig.read_toml(args.config) if args.config else ReconConfig()
    config = _with_pixel_map(config, args)
    if args.estimator is not None:
        from dataclasses import replace

        config = replace(config, emission_estimator=args.estimator)
    jobs = _jobs(args)
    totals = []
    for raw, _ in jobs:
        with open_raw(raw, strict=args.strict) as reader:
            totals.append(len(reader))
            if not reader.pedestal_subtracted and not config.pixel_map:
                raise CommandError(f"'{raw}' holds raw ADC values (pedestal_subtracted = false): give a pixel map "
                                   "with the pedestals, --pixel-map MAP.h5 (made by `trackfit pixel-map`)")
    summary = None
    if args.out_dir is not None:
        from ..recon.campaign import CampaignSummary

        summary = CampaignSummary(args.out_dir, config_toml=config.to_toml(), inputs=jobs, resume=args.resume)
    todo, overwrite, skipped = _resume(jobs, totals, config, args, summary)
    from tqdm.auto import tqdm

    bar = tqdm(total=sum(n for (raw, _), n in zip(jobs, totals, strict=True) if raw in todo),
               unit=" events", unit_scale=True, disable=args.no_progress, dynamic_ncols=True, desc="reconstruct")
    failures = []

    def report(result):
        if result.error:
            failures.append(f"{result.raw_path}: {result.error}")
            if summary is not None:
                summary.update(result.raw_path, state="failed", error=result.error, seconds=round(result.seconds, 3))
            return
        bar.write(_summary(result.out_path) + _parts_note(result))
        if summary is not None:
            summary.record_table(result.raw_path, result.out_path, state="done", reason=todo_reasons.get(
                result.raw_path, ""), seconds=result.seconds, n_parts=result.n_parts,
                n_parts_reused=result.n_parts_reused)

    todo_reasons = {str(raw): reason for raw, reason in todo.items()}
    try:
        _run_jobs(list(todo), overwrite, config, args, bar, report)
    finally:
        bar.close()
        if summary is not None:
            summary.finish_run()
    if args.resume or skipped:
        print(f"{len(todo) - len(failures)} reconstructed, {skipped} skipped (complete and up to date), "
              f"{len(failures)} failed" + (f"; campaign summary: {summary.path}" if summary is not None else ""))
    elif summary is not None and len(jobs) > 1:
        print(f"campaign summary: {summary.path}")
    if failures:
        raise CommandError("; ".join(failures))
    return 0


def _resume(jobs, totals, config, args, summary):
    """The jobs to run (raw -> reason), whether each may replace its output, and the number skipped."""
    todo, overwrite, skipped = {}, [], 0
    if not args.resume:
        for raw, _ in jobs:
            todo[raw] = ""
        return todo, [bool(args.overwrite)] * len(jobs), 0
    from ..recon.campaign import resume_decision
    from ..recon.identity import file_settings_hash

    map_fingerprint = None
    if config.pixel_map:
        from ..io.pixelmap import read_pixel_map

        map_fingerprint = read_pixel_map(config.pixel_map).fingerprint
    for (raw, out), n_events in zip(jobs, totals, strict=True):
        digest = file_settings_hash(config, raw, with_truth=not args.skip_truth, strict=args.strict,
                                    pixel_map_fingerprint=map_fingerprint)
        decision = resume_decision(raw, out, settings=digest, n_events=n_events)
        if decision.skip:
            skipped += 1
            print(f"skipped {raw}: {decision.reason}")
            summary.record_table(raw, out, state="skipped", reason=decision.reason)
        else:
            print(f"to do {raw}: {decision.reason}")
            summary.update(raw, reason=decision.reason)
            todo[raw] = decision.reason
            overwrite.append(out.exists())
    return todo, overwrite, skipped


def _run_jobs(raws, overwrite, config, args, bar, report):
    if not raws:
        return
    pairs = [(raw, _output_of(raw, args)) for raw in raws]
    options = {"strict": args.strict, "overwrite": overwrite, "with_truth": not args.skip_truth}
    if args.batch_size is not None:
        options["batch_size"] = args.batch_size
    if args.scheduler:
        from ..recon.distributed import reconstruct_on_cluster

        def on_result(result):
            bar.update(result.n_rows)
            report(result)

        reconstruct_on_cluster(pairs, config, scheduler=args.scheduler, on_result=on_result,
                               part_events=args.part_events, threads=args.threads or 1, **options)
        return
    from ..recon.parts import plan_jobs, run_jobs_here, run_jobs_locally

    if args.workers > 1:
        jobs = plan_jobs(pairs, config, workers=args.workers, part_events=args.part_events,
                         threads=args.threads or 1, **options)
        run_jobs_locally(jobs, args.workers, on_result=report, progress=bar.update)
        return
    threads = args.threads if args.threads is not None else (os.cpu_count() or 1)
    # one process: whole files with kernel threads (parts only to finish those of an interrupted split run)
    jobs = plan_jobs(pairs, config, workers=1, part_events=args.part_events or _NO_SPLIT, threads=threads,
                     **options)
    run_jobs_here(jobs, on_result=report, progress=bar.update)


#: with one process a file is never split (unless --part-events asks for it)
_NO_SPLIT = 1 << 62


def _output_of(raw, args) -> Path:
    if args.output is not None:
        return Path(args.output)
    from ..recon.pipeline import output_name

    return output_name(raw, args.out_dir)


def _parts_note(result) -> str:
    if result.n_parts <= 1:
        return ""
    reused = f", {result.n_parts_reused} reused" if result.n_parts_reused else ""
    return f"; joined from {result.n_parts} parts{reused}"
