"""``trackfit calibrate -o CAL [--flat-field T[,energy_kev=E]] [--line T,energy_kev=E] [--unpolarized T]
[--polarized T,...]``.

Builds a calibration file (docs/calibration-format.md) from event tables of calibration runs: gain map (and
optionally gain versus time) and energy scale from a flat field of one line (Fe-55 by default) and further lines, or
from lines alone; a spurious-modulation map from unpolarized runs, a modulation-factor curve from polarized runs.
A thin layer over :func:`trackfit.analysis.calibrate.build_calibration`.
"""

from __future__ import annotations

import math
from pathlib import Path

from ..analysis.selection import NoEventsLeftError
from ..cli import CommandError, flags_for_parameters
from ._cuts import add_cut_options, parse_run_spec, print_warnings, selection_from_args
from ._tables import checked_estimate, missing_column_error, no_events_error

#: library parameters of build_calibration quoted in its errors ('min_counts') -> the flags that set them
PARAMETER_FLAGS = {"min_counts": "--gain-min-counts", "energy_edges_kev": "--spurious-energy-edges",
                   "polarization_degree": "degree=P of --polarized"}


def register(subparsers):
    parser = subparsers.add_parser(
        "calibrate", help="make a calibration file from calibration runs (event tables)",
        description="Fit the gain map on a flat field (Fe-55, or any line given with energy_kev=E), the energy "
        "scale on the flat-field line and/or any further lines (lines alone are enough), the spurious modulation on "
        "unpolarized runs and the modulation factor versus energy on polarized runs; write them with their "
        "provenance (inputs, selection, cut flows) to one calibration file. Every run is selected with the default "
        "selection (an emission angle and no failure status bit) plus the cuts given; the cut flow of each run is "
        "printed. Poor fits are reported as warnings.")
    parser.add_argument("-o", "--output", required=True, metavar="CAL", help="calibration file to write")
    parser.add_argument("--flat-field", nargs="+", default=[], metavar="TABLE[,energy_kev=E]",
                        help="flat-field event table(s) of one line: gain map and the first line of the energy "
                        "scale; without energy_kev an Fe-55 source (Mn K-alpha 5.895 keV with K-beta), with it one "
                        "Gaussian line at E keV")
    parser.add_argument("--line", action="append", default=[], metavar="TABLE,energy_kev=E",
                        help="a line of known energy for the energy scale (repeatable; several lines may come from "
                        "one table, e.g. a line and its escape peak); without --flat-field the lines alone make the "
                        "scale (one line: through the origin)")
    parser.add_argument("--unpolarized", action="append", default=[], metavar="TABLE",
                        help="unpolarized run for the spurious-modulation map, one energy node each (repeatable)")
    parser.add_argument("--polarized", action="append", default=[], metavar="TABLE[,degree=P][,angle_deg=A]",
                        help="polarized run for the modulation factor (degree default 1; give the beam angle "
                        "in the detector frame when known) (repeatable)")
    parser.add_argument("--update", metavar="CAL", help="start from an existing calibration file (parts made now "
                        "replace its parts; default: a new calibration)")
    parser.add_argument("--quadratic", action="store_true", help="quadratic energy scale (needs 3 lines)")
    parser.add_argument("--gain-drift", action="store_true",
                        help="also fit gain versus time on the (single) flat-field run")
    parser.add_argument("--gain-cell-mm", default="auto", metavar="MM|auto",
                        help="gain-map cell size in mm (default auto: the smallest of 0.5, 1, 2, 2.5, 5, 10, 20, "
                        "50 mm for which 80 %% of the flat-field events lie in cells of --gain-min-counts events)")
    parser.add_argument("--gain-min-counts", type=int, default=300, metavar="N",
                        help="minimum events in a fitted gain-map cell (default 300: about 0.4 %% precision per "
                        "cell at 18 %% FWHM)")
    parser.add_argument("--spurious-cell-mm", type=float, default=2.0, metavar="MM",
                        help="spurious-map cell size (default 2 mm); cells are centred on the unpolarized data")
    parser.add_argument("--spurious-min-counts", type=int, default=100, metavar="N",
                        help="minimum events in a spurious-map cell (default 100)")
    parser.add_argument("--spurious-energy-edges", nargs="+", type=float, metavar="E_KEV",
                        help="pool the unpolarized runs into these energy bins, one map node each "
                        "(default: one node per run)")
    parser.add_argument("--extent-mm", nargs=4, type=float, metavar=("X0", "X1", "Y0", "Y1"),
                        help="region covered by the maps (default: cells centred on each map's data)")
    parser.add_argument("--weights", choices=("none", "ellipticity", "response"), default="none",
                        help="per-event weights for the spurious map and modulation factor; response: each event's "
                        "expected modulation response from its shape, fitted on the --polarized runs and stored "
                        "in the file (docs/methods.md section 11) (default none)")
    parser.add_argument("--estimator", choices=("two-stage", "adaptive", "skeleton"),
                        help="emission-angle estimate of the --unpolarized and --polarized tables to use (default: "
                        "the one they were reconstructed with); recorded in the file, trackfit polarization refuses "
                        "another")
    parser.add_argument("--figures", metavar="DIR", help="write figures of every fit as PNG (default: no figures)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    add_cut_options(parser, what="unpolarized and polarized events, after calibration (use the same in "
                    "trackfit polarization)")
    add_cut_options(parser, prefix="flat-", what="flat-field and line events", calibrated=False)
    parser.set_defaults(func=run)


#: parameters of build_calibration named in its errors -> the flags of this command
_FLAGS = {"gain_cell_mm": "--gain-cell-mm", "gain_min_counts": "--gain-min-counts",
          "spurious_cell_mm": "--spurious-cell-mm", "spurious_min_counts": "--spurious-min-counts",
          "spurious_energy_edges_kev": "--spurious-energy-edges", "extent_mm": "--extent-mm"}


def _with_flags(message: str) -> str:
    import re

    return re.sub(r"\b(" + "|".join(sorted(_FLAGS, key=len, reverse=True)) + r")\b", lambda m: _FLAGS[m.group(1)],
                  message)


def _check_flags(args) -> None:
    """Values the library would report under its own parameter names (shared by the gain and spurious maps);
    ``--gain-cell-mm`` becomes a size in mm, or None for 'auto'."""
    if args.gain_cell_mm == "auto":
        args.gain_cell_mm = None
    else:
        try:
            args.gain_cell_mm = float(args.gain_cell_mm)
        except ValueError:
            raise CommandError(f"--gain-cell-mm must be a size in mm or 'auto' (got '{args.gain_cell_mm}')") from None
        if not args.gain_cell_mm > 0:
            raise CommandError(f"--gain-cell-mm must be > 0 mm or 'auto' (got {args.gain_cell_mm:g})")
    for flag, value in (("--spurious-cell-mm", args.spurious_cell_mm),):
        if not value > 0:
            raise CommandError(f"{flag} must be > 0 (got {value:g})")
    for flag, value in (("--gain-min-counts", args.gain_min_counts),
                        ("--spurious-min-counts", args.spurious_min_counts)):
        if value < 1:
            raise CommandError(f"{flag} must be >= 1 (got {value})")
    if args.extent_mm is not None:
        x0, x1, y0, y1 = args.extent_mm
        if not (x1 > x0 and y1 > y0):
            raise CommandError(f"--extent-mm X0 X1 Y0 Y1 needs X1 > X0 and Y1 > Y0 (got {x0:g} {x1:g} {y0:g} {y1:g})")


class _Tables:
    """Event tables read once per path (lines of one table share it, so they are found together)."""

    def __init__(self, estimator=None):
        self.tables, self.paths, self.estimator = {}, {}, estimator

    def __call__(self, path, *, angles: bool = False):
        """The table of ``path``, its values checked (``angles``: with the estimate the angle analysis uses)."""
        from ..analysis.estimates import estimator_of
        from ..io.table import read_table

        key = str(Path(path).resolve())
        if key not in self.tables:
            if not Path(path).exists():
                raise FileNotFoundError(f"event table '{path}' does not exist")
            self.tables[key] = read_table(path)
            self.paths[Path(path).name] = path
        table = self.tables[key]
        estimator = (self.estimator or estimator_of(table)) if angles else "two-stage"
        checked_estimate(path, table, estimator)
        return table


def run(args) -> int:
    import warnings

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            return _run(args)
        finally:
            print_warnings("calibrate", caught)


def _run(args) -> int:
    from ..analysis import Calibration
    from ..analysis.calibrate import CalibrationRun, build_calibration

    if not (args.flat_field or args.line or args.unpolarized or args.polarized):
        raise CommandError("nothing to calibrate: give --flat-field, --line, --unpolarized and/or --polarized")
    _check_flags(args)
    from ..io.whole_files import check_output_file, make_output_folder

    output = check_output_file(args.output, flag="-o/--output", overwrite=args.overwrite)
    if args.figures:  # checked before the fits, which take a while
        make_output_folder(args.figures, flag="--figures")
    read = _Tables(args.estimator)
    flat = []
    for spec in args.flat_field:
        path, opts = parse_run_spec(spec, ("energy_kev",))
        if "energy_kev" in opts and not opts["energy_kev"] > 0:
            raise CommandError(f"--flat-field '{spec}': energy_kev must be > 0 keV (got {opts['energy_kev']:g})")
        flat.append(CalibrationRun(table=read(path), label=Path(path).name, energy_kev=opts.get("energy_kev")))
    lines = []
    for spec in args.line:
        path, opts = parse_run_spec(spec, ("energy_kev",))
        if "energy_kev" not in opts:
            raise CommandError(f"--line '{spec}' needs energy_kev=E")
        if not opts["energy_kev"] > 0:
            raise CommandError(f"--line '{spec}': energy_kev must be > 0 keV (got {opts['energy_kev']:g})")
        lines.append(CalibrationRun(table=read(path), label=Path(path).name, energy_kev=opts["energy_kev"]))
    unpolarized = [CalibrationRun(table=read(p, angles=True), label=Path(p).name) for p in args.unpolarized]
    polarized = []
    for spec in args.polarized:
        path, opts = parse_run_spec(spec, ("degree", "angle_deg"))
        angle = opts.get("angle_deg")
        polarized.append(CalibrationRun(table=read(path, angles=True), label=Path(path).name,
                                        polarization_degree=opts.get("degree", 1.0),
                                        polarization_angle_rad=None if angle is None else math.radians(angle)))
    base = Calibration.load(args.update) if args.update else None
    selection, flat_selection = selection_from_args(args), selection_from_args(args, prefix="flat-")
    with flags_for_parameters(PARAMETER_FLAGS):
        try:
            calibration, report = build_calibration(
                flat_field=flat, lines=lines, unpolarized=unpolarized, polarized=polarized,
                selection=selection, flat_selection=flat_selection, weighting=args.weights,
                gain_cell_mm=args.gain_cell_mm, gain_min_counts=args.gain_min_counts, gain_drift=args.gain_drift,
                quadratic=args.quadratic, spurious_cell_mm=args.spurious_cell_mm,
                spurious_min_counts=args.spurious_min_counts, spurious_energy_edges_kev=args.spurious_energy_edges,
                extent_mm=args.extent_mm, base=base, estimator=args.estimator)
        except NoEventsLeftError as err:
            raise _no_events(err, read) from None
        except (KeyError, ValueError) as err:  # build_calibration's parameters (gain_cell_mm=...) become flags
            text = _with_flags(str(err)) if isinstance(err, ValueError) else str(err)
            if text == str(err):
                explained = missing_column_error(err, list(read.paths.values()))
                if explained is not None:
                    raise explained from None
                raise
            raise CommandError(text) from None
    calibration.save(output, overwrite=args.overwrite)
    _print_report(calibration, report)
    print(f"wrote {output}")
    if args.figures:
        _figures(calibration, report, Path(args.figures), polarized)
    return 0


def _no_events(err, read) -> CommandError:
    """One line naming the run's table, the cut flow and why the default selection removed its events."""
    import re

    found = re.search(r"in (.+?) run '([^']+)'", str(err))
    if not found or found.group(2) not in read.paths:
        return CommandError(" ".join(str(err).split()))
    role, path = found.group(1), read.paths[found.group(2)]
    return no_events_error(err, f"{role} run '{path}'", [path], read.estimator, [path])


def _print_report(calibration, report):
    roles = {"flat field": "flat field", "line": "line", "unpolarized": "unpolarized", "polarized": "polarized"}
    for label, role, flow in report.cut_flows:
        print(f"Cut flow of {roles[role]} run {label}")
        print(flow)
        print()
    if report.flat_field_fit is not None:
        print(f"flat-field line at {report.flat_field_line_kev:g} keV (gain-corrected):")
        print(report.flat_field_fit)
    for label, energy, fit in report.line_fits:
        print(f"line {label} at {energy:g} keV: peak {fit.peak:.5g} ± {fit.peak_err:.2g}, "
              f"FWHM/peak {100 * fit.fwhm_frac:.1f} %, {fit.quality}")
    for label, point in report.modulation_points:
        print(f"modulation factor {label}: {point.value:.4f} ± {point.error:.4f} at {point.energy_kev:.3f} keV "
              f"({point.n_events} events)")
    for note in report.notes:
        print(f"note: {_with_flags(note)}")
    print(calibration)


def _figures(calibration, report, out: Path, polarized=()):
    from ..analysis import figures
    if report.flat_field_fit is not None:
        figures.save_figure(figures.plot_spectrum_fit(report.flat_field_fit,
                                                      xlabel="gain-corrected pulse height [ADC]"),
                            out / "flat_field_spectrum.png")
    if calibration.gain_map is not None:
        figures.save_figure(figures.plot_gain_map(calibration.gain_map), out / "gain_map.png")
    for label, energy, fit in report.line_fits:
        xlabel = "gain-corrected pulse height [ADC]" if calibration.gain_map is not None else "pulse height [ADC]"
        figures.save_figure(figures.plot_spectrum_fit(fit, xlabel=xlabel),
                            out / f"line_{Path(label).stem}_{energy:.3g}kev.png")
    if calibration.gain_drift is not None:
        figures.save_figure(figures.plot_gain_drift(calibration.gain_drift), out / "gain_drift.png")
    if calibration.modulation_factor is not None:
        provenance = getattr(polarized[0].table, "provenance", None) if polarized else None
        figures.save_figure(figures.plot_modulation_factor(calibration.modulation_factor, provenance=provenance,
                                                           calibrated=calibration.energy_scale is not None),
                            out / "modulation_factor.png")
    if calibration.spurious_modulation is not None:
        for k, energy in enumerate(calibration.spurious_modulation.energy_kev):
            figures.save_figure(figures.plot_spurious_map(calibration.spurious_modulation, k),
                                out / f"spurious_map_{energy:.2f}kev.png")
    print(f"wrote figures to {out}/")
