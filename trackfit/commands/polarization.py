"""``trackfit polarization TABLE... -c CAL [cuts]``: polarization of one run, or of several runs together, with a
calibration file (several tables are read one at a time and their sums combined, so their number does not limit
the memory).

Prints the Stokes table (degree, angle, errors, Rice interval, MDP99), the cut flow, per-band results and the
modulation-curve fit; writes a JSON result and figures on request. A thin layer over
:func:`trackfit.analysis.measure_polarization`.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..cli import CommandError, flags_for_parameters
from ._cuts import add_cut_options, has_cut_options, print_warnings, selection_from_args
from ._tables import checked_estimate, missing_column_error, no_events_error, table_columns

#: library parameters of measure_polarization -> the flags that set them (errors name the flag)
PARAMETER_FLAGS = {"n_bins": "--bins", "confidence_level": "--confidence", "energy_bands_kev": "--bands",
                   "background_scale": "--background-scale"}


def register(subparsers):
    parser = subparsers.add_parser(
        "polarization", help="measure the polarization of a run (Stokes parameters, degree, angle, MDP)",
        description="Apply a calibration file to an event table, select events and compute the normalized, "
        "modulation-corrected Stokes parameters (unbinned), polarization degree and angle with errors, the "
        "Rice-based interval of the degree and the MDP99; optionally per energy band and with an off-source "
        "background subtracted. Events: the default selection (an emission angle and no failure status bit), plus "
        "the cuts given; it is the first line of the cut flow. A warning says when the status and track-shape cuts "
        "differ from those the calibration was made with; a calibration made with other weights or another "
        "emission-angle estimate is refused.")
    parser.add_argument("table", metavar="TABLE", nargs="+",
                        help="event table(s) of the run(s) (trackfit reconstruct output); several tables are measured "
                        "together, as if concatenated, one at a time in memory")
    parser.add_argument("-c", "--calibration", metavar="CAL",
                        help="calibration file (trackfit calibrate output; default: none, then give "
                        "--modulation-factor)")
    parser.add_argument("--modulation-factor", type=float, metavar="MU",
                        help="one modulation factor for all events, in (0, 1] (default: the calibration's curve)")
    parser.add_argument("--weights", choices=("none", "ellipticity", "response"), default="none",
                        help="per-event weights; response needs a calibration made with --weights response; the "
                        "calibration must have been made with the same weights (default none)")
    parser.add_argument("--estimator", choices=("two-stage", "adaptive", "skeleton"),
                        help="emission-angle estimate of the table to use (default: the one it was reconstructed "
                        "with); the calibration must have been made with the same")
    parser.add_argument("--bands", nargs="+", type=float, metavar="E_KEV",
                        help="energy band edges in keV for a per-band table (default: no per-band table)")
    parser.add_argument("--bins", type=int, default=36, metavar="N",
                        help="bins of the modulation curve (multiple of 12)")
    parser.add_argument("--confidence", type=float, default=0.6827, metavar="CL",
                        help="confidence level of the interval of the degree (default 0.6827)")
    parser.add_argument("--use-gain-drift", action="store_true",
                        help="apply the calibration's gain-versus-time part (only for the run it was made on)")
    parser.add_argument("--json", metavar="OUT", help="write the result as JSON (default: printed only)")
    parser.add_argument("--figures", metavar="DIR",
                        help="write the modulation curve and Q/U plane as PNG (default: no figures)")
    add_cut_options(parser, what="source events")
    bkg = parser.add_argument_group("background")
    bkg.add_argument("--background-table", metavar="TABLE", nargs="+",
                     help="table(s) of the off-source events (default: the same run(s))")
    bkg.add_argument("--background-scale", type=float, metavar="R",
                     help="(area x time on) / (area x time off), >= 0; required with a background (default: "
                     "no background subtracted)")
    add_cut_options(parser, prefix="bkg-", what="off-source events")
    parser.set_defaults(func=run)


def run(args) -> int:
    import warnings

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            return _run(args)
        finally:
            print_warnings("polarization", caught)


def _run(args) -> int:
    from ..analysis import Calibration, NoEventsLeftError, measure_polarization
    from ..analysis.estimates import EstimateMismatchError, estimator_of
    from ..io.table import read_table
    from ..io.whole_files import write_text_whole

    for path in [*args.table, *(args.background_table or [])]:
        if not Path(path).exists():
            raise FileNotFoundError(f"event table '{path}' does not exist")
    if args.background_scale is not None and not args.background_scale >= 0:
        raise CommandError(f"--background-scale must be >= 0 (got {args.background_scale:g})")
    if args.modulation_factor is not None and not 0 < args.modulation_factor <= 1:
        raise CommandError(f"--modulation-factor must be in (0, 1] (got {args.modulation_factor:g})")
    _check_outputs(args)
    calibration = Calibration.load(args.calibration) if args.calibration else None
    if args.modulation_factor is None and getattr(calibration, "modulation_factor", None) is None:
        where = (f"the calibration file '{args.calibration}' has no modulation-factor curve" if calibration
                 else "no calibration file was given")
        raise CommandError(f"measuring polarization needs a modulation factor, and {where}: give -c CAL made "
                           "with --polarized runs, or --modulation-factor MU")
    selection = selection_from_args(args)
    background_selection = selection_from_args(args, prefix="bkg-") if has_cut_options(args, prefix="bkg-") else None
    if (background_selection is not None or args.background_table) and args.background_scale is None:
        raise CommandError("a background (--bkg-* cuts or --background-table) needs --background-scale")
    several = len(args.table) > 1
    # one table is read whole (as before); several are streamed by measure_polarization, one at a time
    table = [Path(p) for p in args.table] if several else read_table(args.table[0])
    background_table = None
    if args.background_table:
        background_table = ([Path(p) for p in args.background_table] if len(args.background_table) > 1
                            else read_table(args.background_table[0]))
    estimator = args.estimator or estimator_of(table if not several else read_table(args.table[0], columns=[]))
    _check_values(args.table, table, estimator)
    if background_table is not None:
        _check_values(args.background_table, background_table, estimator)
    inputs = [*args.table, *(args.background_table or [])]
    try:
        with flags_for_parameters(PARAMETER_FLAGS):
            measurement = measure_polarization(
                table, selection=selection, calibration=calibration, modulation_factor=args.modulation_factor,
                weighting=args.weights, background_selection=background_selection,
                background_table=background_table, background_scale=args.background_scale,
                energy_bands_kev=args.bands, n_bins=args.bins, use_gain_drift=args.use_gain_drift,
                confidence_level=args.confidence, estimator=args.estimator)
    except NoEventsLeftError as err:
        what = f"the {len(args.table)} tables" if several else f"event table '{args.table[0]}'"
        raise no_events_error(err, what, args.table if several else [table], estimator, args.table) from None
    except EstimateMismatchError as err:
        raise CommandError(f"calibration '{args.calibration}' and event table(s) {', '.join(args.table)}: "
                           f"{err}") from None
    except (KeyError, ValueError) as err:
        explained = missing_column_error(err, inputs)
        if explained is None:
            raise
        raise explained from None
    runs = ", ".join(args.table) if len(args.table) <= 3 else f"{len(args.table)} tables ({args.table[0]}, ...)"
    print(f"run{'s' if several else ''}: {runs}" + (f"   calibration: {args.calibration}" if args.calibration
                                                      else ""))
    print(measurement)
    if args.json:
        result = measurement.to_dict()
        from ..analysis.calibrate import table_identity

        tables = [_identity(p, table_identity) for p in args.table]
        backgrounds = [_identity(p, table_identity) for p in args.background_table or []]
        result["inputs"] = {"table": tables[0], "tables": tables, "calibration": args.calibration,
                            "background_table": backgrounds[0] if backgrounds else None,
                            "background_tables": backgrounds}
        if calibration is not None:
            result["calibration_provenance"] = calibration.provenance
        from .. import __version__

        result["trackfit_version"] = __version__
        write_text_whole(args.json, json.dumps(result, indent=2, default=float) + "\n")
        print(f"wrote {args.json}")
    if args.figures:
        from ..analysis import figures

        out = Path(args.figures)
        stem = Path(args.table[0]).stem + (f"_and_{len(args.table) - 1}_more" if several else "")
        if measurement.modulation is not None:
            figures.save_figure(figures.plot_modulation_curve(measurement.modulation),
                                out / f"{stem}_modulation_curve.png")
        figures.save_figure(figures.plot_stokes_plane(measurement.stokes), out / f"{stem}_stokes_plane.png")
        print(f"wrote figures to {out}/")
    return 0


def _check_outputs(args) -> None:
    """Outputs that cannot be written are reported before any table is read."""
    from ..io.whole_files import check_output_file, make_output_folder

    if args.json:
        check_output_file(args.json, flag="--json", overwrite=True)
    if args.figures:
        make_output_folder(args.figures, flag="--figures")


def _identity(path, table_identity) -> dict:
    """What the JSON records of an input table (its provenance and row count; one column is read)."""
    from ..io.table import read_table

    return table_identity(read_table(path, columns=["status"]), str(path))


def _check_values(paths, table, estimator) -> None:
    """Refuse tables whose usable events hold values the reconstruction never writes (one table at a time)."""
    from ..io.table import read_table
    from ..recon.estimators import ESTIMATE_COLUMNS

    needed = ["event_index", "status", "energy_kev", "pulse_height", *ESTIMATE_COLUMNS[estimator].values()]
    for path in paths:
        one = table if len(paths) == 1 else read_table(path, columns=[c for c in needed if c in table_columns(path)])
        checked_estimate(path, one, estimator)
