"""``trackfit response (--preset NAME | --design DESIGN.toml) -o RESPONSE.h5``: the detector response of a design.

Simulates a 100 %-polarized beam at each energy of a grid, reconstructs it and measures detection efficiency,
modulation factor, energy resolution, ROI size and bytes per event (docs/response-format.md). With
``--calibration CAL.h5 --run RAW TABLE``, the response of a built detector from its calibration file and measured
runs instead. A thin layer over :mod:`trackfit.response_builder`.
"""

from __future__ import annotations

import time
from pathlib import Path

from ..cli import CommandError, translate_parameters

_FLAGS = {"energies_kev": "--energies-kev", "n_energies": "--n-energies", "events_per_energy": "--events-per-energy",
          "seed": "--seed", "beam_sigma_mm": "--beam-sigma-mm", "min_efficiency": "--min-efficiency"}


def register(subparsers):
    parser = subparsers.add_parser(
        "response", help="detector response of a design: efficiency, modulation factor, resolution, bytes per event",
        description="Simulate a 100 %-polarized beam through a design at each energy of a grid (default: "
        "8 energies over the band where window x gas absorption >= 1 %), reconstruct it and measure detection "
        "efficiency, modulation factor, energy resolution, ROI pixels and raw-format bytes per event; write them "
        "to a response file for trackfit plan. Energies run in parallel and are cached: a second call takes "
        "seconds. With --calibration and --run: the response of a built detector from its calibration file.")
    design = parser.add_argument_group("the design")
    design.add_argument("--preset", metavar="NAME", help="a shipped design (trackfit simulate --list-presets)")
    design.add_argument("--design", metavar="DESIGN.toml", help="a design of your own (a simulation config)")
    parser.add_argument("-o", "--output", required=True, metavar="RESPONSE.h5", help="response file to write")
    parser.add_argument("--name", metavar="NAME", help="label of the response in plans and figures "
                        "(default: the preset name or the design file's stem)")
    grid = parser.add_argument_group("energy grid and statistics (simulated responses)")
    grid.add_argument("--settings", metavar="TOML", help="a [response] settings file; the flags below override it "
                      "(default: none)")
    grid.add_argument("--energies-kev", nargs="+", type=float, metavar="E",
                      help="grid energies (default: --n-energies over the design's useful band)")
    grid.add_argument("--n-energies", type=int, metavar="N", help="points of the default grid (default 8)")
    grid.add_argument("--events-per-energy", type=int, metavar="N",
                      help="triggered events per energy (default 2000: mu to about +-0.03; use 20000 or more for "
                      "final numbers)")
    grid.add_argument("--seed", type=int, metavar="S", help="random seed (default 0)")
    grid.add_argument("--beam-sigma-mm", type=float, metavar="MM", help="Gaussian beam spot (default 0.5 mm)")
    parser.add_argument("--config", metavar="TOML", help="reconstruction settings (default: the defaults of "
                        "trackfit reconstruct --print-settings)")
    parser.add_argument("--cuts", metavar="TOML", help="selection file whose cuts are added to the default "
                        "selection (default: none; with --calibration, the selection recorded in the calibration)")
    run = parser.add_argument_group("running")
    run.add_argument("--workers", type=int, metavar="N", help="processes (default: one per CPU)")
    run.add_argument("--scheduler", metavar="ADDRESS", help="run one task per energy on a Dask cluster: a scheduler "
                     "address (tcp://host:8786) or 'local' (needs trackfit[dask]) (default: none)")
    run.add_argument("--cache-dir", metavar="DIR", help="cache of measured energies (default: $TRACKFIT_CACHE_DIR, "
                     "else $XDG_CACHE_HOME/trackfit, else .cache/trackfit in your home folder)")
    run.add_argument("--no-cache", action="store_true", help="neither read nor write the cache")
    run.add_argument("--keep-runs", metavar="DIR", help="also write each energy's simulated raw file into DIR "
                     "(default: none)")
    run.add_argument("--no-progress", action="store_true", help="no progress bar")
    measured = parser.add_argument_group("a built detector instead of a simulation")
    measured.add_argument("--calibration", metavar="CAL.h5", help="calibration file with a modulation-factor curve "
                          "(trackfit calibrate --polarized); needs --preset or --design (the detector as built) and "
                          "--run (default: none)")
    measured.add_argument("--run", nargs=2, action="append", default=[], metavar=("RAW", "TABLE"),
                          help="a measured run: its raw file (ROI sizes) and its event table (selected share, "
                          "resolution); repeatable")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    parser.set_defaults(func=run_command)


def _design(args):
    from ..simulate import SimConfig, load_preset

    if (args.preset is None) == (args.design is None):
        raise CommandError("give the design with either --preset NAME or --design DESIGN.toml")
    if args.preset is not None:
        return load_preset(args.preset), args.preset
    return SimConfig.load(args.design), Path(args.design).stem


def _settings(args):
    from ..response_builder import ResponseSettings

    settings = ResponseSettings.read_toml(args.settings) if args.settings else ResponseSettings()
    changes = {name: value for name, value in (
        ("energies_kev", tuple(args.energies_kev) if args.energies_kev else None), ("n_energies", args.n_energies),
        ("events_per_energy", args.events_per_energy), ("seed", args.seed), ("beam_sigma_mm", args.beam_sigma_mm))
        if value is not None}
    try:
        return ResponseSettings.from_dict({**settings.to_dict(), **changes})
    except ValueError as err:
        raise CommandError(_with_flags(str(err))) from None


def _with_flags(message: str) -> str:
    return translate_parameters(message, _FLAGS).replace("response settings: ", "")


def _selection(args):
    from ..analysis import SelectionError
    from ..analysis.selection import read_selection
    from ..response_builder import response_selection

    if not args.cuts:
        return None  # the default selection (a calibration's: the one recorded with its modulation factor)
    if not Path(args.cuts).exists():
        raise FileNotFoundError(f"selection file '{args.cuts}' (--cuts) does not exist")
    try:
        return response_selection(read_selection(args.cuts))
    except SelectionError as err:
        raise CommandError(f"--cuts: {err}") from None


def run_command(args) -> int:
    from ..io.whole_files import check_output_file, make_output_folder
    from ..recon import ReconConfig

    output = check_output_file(args.output, flag="-o/--output", overwrite=args.overwrite)
    if args.keep_runs:
        make_output_folder(args.keep_runs, flag="--keep-runs")
    if args.workers is not None and args.workers < 1:
        raise CommandError(f"--workers must be >= 1 (got {args.workers})")
    design, default_name = _design(args)
    recon = ReconConfig.read_toml(args.config) if args.config else None
    selection = _selection(args)
    started = time.perf_counter()
    if args.calibration:
        from ..response_builder import MeasuredRun, response_from_calibration

        if not args.run:
            raise CommandError("--calibration needs at least one --run RAW TABLE (selected share and ROI sizes)")
        if not Path(args.calibration).exists():
            raise FileNotFoundError(f"calibration file '{args.calibration}' does not exist")
        grid = args.energies_kev
        response = response_from_calibration(
            args.calibration, design, [MeasuredRun(raw, table) for raw, table in args.run],
            name=args.name or default_name, energies_kev=grid, n_energies=args.n_energies or 5,
            selection=selection, recon_config=recon)
    else:
        if args.run:
            raise CommandError("--run belongs to --calibration (a built detector); a simulated response needs none")
        from ..response_builder import build_response

        response = build_response(design, name=args.name or default_name, settings=_settings(args),
                                  recon_config=recon, selection=selection, workers=args.workers,
                                  scheduler=args.scheduler, cache_dir=args.cache_dir, use_cache=not args.no_cache,
                                  keep_runs=args.keep_runs, progress=not args.no_progress)
    path = response.save(output, overwrite=args.overwrite)
    print(response.summary())
    print(f"wrote {path} in {time.perf_counter() - started:.1f} s")
    return 0
