"""``trackfit reconstruct RAW... (-o OUT | --out-dir DIR)``: raw event files to event tables.

One file runs in this process with kernel threads; several files run in parallel in a process pool started with
the ``spawn`` method (numba's threading layers may hang in a forked child), or, with ``--scheduler``, as tasks of a
Dask distributed cluster. One progress bar counts the events of all files.
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
                        help="files reconstructed in parallel, one process each (default 1)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="run one task per file on a Dask distributed cluster: a scheduler address "
                        "(tcp://host:8786) or 'local'; every worker must see the paths (needs trackfit[dask]; "
                        "default: no cluster, processes on this machine)")
    parser.add_argument("--threads", type=int, default=None, metavar="N",
                        help="kernel threads per file (default: all CPUs with one worker, 1 with several)")
    parser.add_argument("--batch-size", type=int, default=None, metavar="N",
                        help=f"events per batch; memory grows with it (default {DEFAULT_BATCH_SIZE})")
    parser.add_argument("--strict", action="store_true",
                        help="stop at the first malformed event instead of flagging it")
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
        outs = [Path(args.output)]
    else:
        from ..recon.pipeline import output_name

        out_dir = Path(args.out_dir)
        out_dir.mkdir(parents=True, exist_ok=True)
        outs = [output_name(raw, out_dir) for raw in raws]
        seen = {}
        for raw, out in zip(raws, outs, strict=True):
            if out in seen:
                raise CommandError(f"'{raw}' and '{seen[out]}' would both be written to '{out}'")
            seen[out] = raw
    if not args.overwrite:
        for out in outs:
            if out.exists():
                raise FileExistsError(f"'{out}' exists; pass --overwrite to replace it")
    return list(zip(raws, outs, strict=True))


def _worker(raw, out, config_toml, options, progress_queue):
    """Reconstruct one file in a pool process; progress goes to the parent through a manager queue."""
    from ..recon import ReconConfig, reconstruct_file

    config = ReconConfig.from_toml(config_toml)
    report = (lambda n: progress_queue.put(n)) if progress_queue is not None else False
    reconstruct_file(raw, out, config, progress=report, **options)
    return _summary(out)


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
    workers = min(args.workers, len(jobs))
    threads = args.threads if args.threads is not None else ((os.cpu_count() or 1) if workers == 1 else 1)
    options = {"threads": threads, "strict": args.strict, "overwrite": args.overwrite}
    if args.batch_size is not None:
        options["batch_size"] = args.batch_size

    from tqdm.auto import tqdm

    bar = tqdm(total=sum(totals), unit=" events", unit_scale=True, disable=args.no_progress, dynamic_ncols=True,
               desc="reconstruct")
    failures = []
    try:
        if args.scheduler:
            from ..recon.distributed import reconstruct_on_cluster

            options["threads"] = args.threads or 1

            def report(result):
                bar.update(result.n_rows)
                if result.error:
                    failures.append(f"{result.raw_path}: {result.error}")
                else:
                    bar.write(str(result))

            reconstruct_on_cluster(jobs, config, scheduler=args.scheduler, on_result=report, **options)
        elif workers == 1:
            from ..recon import reconstruct_file

            for raw, out in jobs:
                try:
                    reconstruct_file(raw, out, config, progress=bar.update, **options)
                except (ValueError, OSError, KeyError) as err:
                    failures.append(f"{raw}: {err}")
                    continue
                bar.write(_summary(out))
        else:
            failures = _run_pool(jobs, config, options, workers, bar)
    finally:
        bar.close()
    if failures:
        raise CommandError("; ".join(failures))
    return 0


def _run_pool(jobs, config, options, workers, bar):
    import multiprocessing
    import queue
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    context = multiprocessing.get_context("spawn")
    failures = []
    with context.Manager() as manager, ProcessPoolExecutor(workers, mp_context=context) as pool:
        progress = manager.Queue()
        futures = {pool.submit(_worker, raw, out, config.to_toml(), options, progress): raw for raw, out in jobs}
        pending = set(futures)

        def drain():
            while True:
                try:
                    bar.update(progress.get_nowait())
                except queue.Empty:
                    return

        while pending:
            done, pending = wait(pending, timeout=0.2, return_when=FIRST_COMPLETED)
            drain()
            for future in done:
                try:
                    bar.write(future.result())
                except (ValueError, OSError, KeyError) as err:
                    failures.append(f"{futures[future]}: {err}")
        drain()
    return failures
