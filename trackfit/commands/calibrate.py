"""``trackfit calibrate -o CAL [--flat-field T] [--line T,energy_kev=E] [--unpolarized T] [--polarized T,...]``.

Builds a calibration file (docs/calibration-format.md) from event tables of calibration runs: gain map (and
optionally gain versus time) and energy scale from an Fe-55 flat field and further lines, a spurious-modulation map
from unpolarized runs, a modulation-factor curve from polarized runs. A thin layer over
:func:`trackfit.analysis.calibrate.build_calibration`.
"""

from __future__ import annotations

import math
from pathlib import Path

from ..cli import CommandError, flags_for_parameters
from ._cuts import add_cut_options, parse_run_spec, selection_from_args

#: library parameters of build_calibration -> the flags that set them (errors name the flag)
PARAMETER_FLAGS = {"min_counts": "--gain-min-counts", "energy_edges_kev": "--spurious-energy-edges",
                   "polarization_degree": "degree=P of --polarized"}


def register(subparsers):
    parser = subparsers.add_parser(
        "calibrate", help="make a calibration file from calibration runs (event tables)",
        description="Fit the gain map and energy scale on an Fe-55 flat field (plus optional further lines), "
        "the spurious modulation on unpolarized runs and the modulation factor versus energy on polarized runs; "
        "write them with their provenance to one calibration file.")
    parser.add_argument("-o", "--output", required=True, metavar="CAL", help="calibration file to write")
    parser.add_argument("--flat-field", nargs="+", default=[], metavar="TABLE",
                        help="Fe-55 flat-field event table(s): gain map and the K-alpha line (5.895 keV)")
    parser.add_argument("--line", action="append", default=[], metavar="TABLE,energy_kev=E",
                        help="a further line for the energy scale (repeatable)")
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
    parser.add_argument("--gain-cell-mm", type=float, default=1.0, metavar="MM",
                        help="gain-map cell size (default 1 mm)")
    parser.add_argument("--gain-min-counts", type=int, default=300, metavar="N",
                        help="minimum events in a fitted gain-map cell (default 300)")
    parser.add_argument("--spurious-cell-mm", type=float, default=2.0, metavar="MM",
                        help="spurious-map cell size (default 2 mm)")
    parser.add_argument("--spurious-min-counts", type=int, default=100, metavar="N",
                        help="minimum events in a spurious-map cell (default 100)")
    parser.add_argument("--spurious-energy-edges", nargs="+", type=float, metavar="E_KEV",
                        help="pool the unpolarized runs into these energy bins, one map node each "
                        "(default: one node per run)")
    parser.add_argument("--extent-mm", nargs=4, type=float, metavar=("X0", "X1", "Y0", "Y1"),
                        help="region covered by the maps (default: range of the flat-field positions)")
    parser.add_argument("--weights", choices=("none", "ellipticity"), default="none",
                        help="per-event weights for the spurious map and modulation factor (default none)")
    parser.add_argument("--figures", metavar="DIR", help="write figures of every fit as PNG (default: no figures)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    add_cut_options(parser, what="unpolarized and polarized events (after calibration; default: status == 0)")
    add_cut_options(parser, prefix="flat-", what="flat-field and line events (default: status == 0)")
    parser.set_defaults(func=run)


def _read(path):
    from ..io.table import read_table

    if not Path(path).exists():
        raise FileNotFoundError(f"event table '{path}' does not exist")
    return read_table(path)


def _selection_or_default(args, prefix=""):
    from ..analysis import Everything, StatusCut

    selection = selection_from_args(args, prefix=prefix)
    return StatusCut() if isinstance(selection, Everything) else selection


def _check_flags(args) -> None:
    """Values the library would report under its own parameter names (shared by the gain and spurious maps)."""
    for flag, value in (("--gain-cell-mm", args.gain_cell_mm), ("--spurious-cell-mm", args.spurious_cell_mm)):
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


def run(args) -> int:
    from ..analysis import Calibration
    from ..analysis.calibrate import CalibrationRun, build_calibration

    if not (args.flat_field or args.line or args.unpolarized or args.polarized):
        raise CommandError("nothing to calibrate: give --flat-field, --line, --unpolarized and/or --polarized")
    _check_flags(args)
    output = Path(args.output)
    if output.exists() and not args.overwrite:
        raise FileExistsError(f"'{output}' exists; pass --overwrite to replace it")
    flat = [CalibrationRun(table=_read(p), label=Path(p).name) for p in args.flat_field]
    lines = []
    for spec in args.line:
        path, opts = parse_run_spec(spec, ("energy_kev",))
        if "energy_kev" not in opts:
            raise CommandError(f"--line '{spec}' needs energy_kev=E")
        if not opts["energy_kev"] > 0:
            raise CommandError(f"--line '{spec}': energy_kev must be > 0 keV (got {opts['energy_kev']:g})")
        lines.append(CalibrationRun(table=_read(path), label=Path(path).name, energy_kev=opts["energy_kev"]))
    unpolarized = [CalibrationRun(table=_read(p), label=Path(p).name) for p in args.unpolarized]
    polarized = []
    for spec in args.polarized:
        path, opts = parse_run_spec(spec, ("degree", "angle_deg"))
        angle = opts.get("angle_deg")
        polarized.append(CalibrationRun(table=_read(path), label=Path(path).name,
                                        polarization_degree=opts.get("degree", 1.0),
                                        polarization_angle_rad=None if angle is None else math.radians(angle)))
    base = Calibration.load(args.update) if args.update else None
    with flags_for_parameters(PARAMETER_FLAGS):
        calibration, report = build_calibration(
            flat_field=flat, lines=lines, unpolarized=unpolarized, polarized=polarized,
            selection=_selection_or_default(args), flat_selection=_selection_or_default(args, "flat-"),
            weighting=args.weights, gain_cell_mm=args.gain_cell_mm, gain_min_counts=args.gain_min_counts,
            gain_drift=args.gain_drift, quadratic=args.quadratic, spurious_cell_mm=args.spurious_cell_mm,
            spurious_min_counts=args.spurious_min_counts, spurious_energy_edges_kev=args.spurious_energy_edges,
            extent_mm=args.extent_mm, base=base)
    calibration.save(output, overwrite=args.overwrite)
    _print_report(calibration, report)
    print(f"wrote {output}")
    if args.figures:
        _figures(calibration, report, Path(args.figures), polarized)
    return 0


def _print_report(calibration, report):
    if report.flat_field_fit is not None:
        print("flat field (gain-corrected):")
        print(report.flat_field_fit)
    for label, energy, fit in report.line_fits:
        print(f"line {label} at {energy:g} keV: peak {fit.peak:.5g} ± {fit.peak_err:.2g}, "
              f"FWHM/peak {100 * fit.fwhm_frac:.1f} %")
    for label, point in report.modulation_points:
        print(f"modulation factor {label}: {point.value:.4f} ± {point.error:.4f} at {point.energy_kev:.3f} keV "
              f"({point.n_events} events)")
    for note in report.notes:
        print(f"note: {note}")
    print(calibration)


def _figures(calibration, report, out: Path, polarized=()):
    from ..analysis import figures

    out.mkdir(parents=True, exist_ok=True)
    if report.flat_field_fit is not None:
        figures.save_figure(figures.plot_spectrum_fit(report.flat_field_fit,
                                                      xlabel="gain-corrected pulse height [ADC]"),
                            out / "flat_field_spectrum.png")
    if calibration.gain_map is not None:
        figures.save_figure(figures.plot_gain_map(calibration.gain_map), out / "gain_map.png")
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
