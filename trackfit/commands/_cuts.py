"""Selection options shared by the analysis commands: a TOML selection file and/or a few flags."""

from __future__ import annotations

from ..cli import CommandError, flags_for_parameters


def add_cut_options(parser, *, prefix: str = "", what: str = "events") -> None:
    """Add ``--{prefix}cuts TOML``, ``--{prefix}status-ok``, ``--{prefix}energy-kev LO HI``, ``--{prefix}circle X Y R``
    and ``--{prefix}min-elongation`` to a parser."""
    group = parser.add_argument_group(f"selection of {what}" + (f" ({prefix.rstrip('-')})" if prefix else ""))
    group.add_argument(f"--{prefix}cuts", metavar="TOML", help="selection file (keys: status, allowed_status, "
                       "energy_kev, n_pixels, elongation, [region], [range]; see trackfit.analysis.selection; "
                       "default: none)")
    group.add_argument(f"--{prefix}status-ok", action="store_true",
                       help="keep only fully reconstructed events (status == 0)")
    group.add_argument(f"--{prefix}energy-kev", nargs=2, type=float, metavar=("LO", "HI"),
                       help="energy window in keV (calibrated energies; default: no energy cut)")
    group.add_argument(f"--{prefix}circle", nargs=3, type=float, metavar=("X_MM", "Y_MM", "R_MM"),
                       help="keep conversion points within R_MM of (X_MM, Y_MM) (default: the whole chip)")
    group.add_argument(f"--{prefix}min-elongation", type=float, metavar="RATIO",
                       help="keep tracks with m2_major_mm2 / m2_minor_mm2 >= RATIO (default: no elongation cut)")


def selection_from_args(args, *, prefix: str = ""):
    """The selection given by the options of :func:`add_cut_options` (all combined with 'and')."""
    from ..analysis import CircleRegion, ElongationCut, EnergyWindow, Everything, SelectionError, StatusCut
    from ..analysis.selection import read_selection

    key = prefix.replace("-", "_")
    selection = Everything()
    try:
        cuts = getattr(args, f"{key}cuts")
        if cuts:
            selection = selection & read_selection(cuts)
        if getattr(args, f"{key}status_ok"):
            selection = selection & StatusCut()
        window = getattr(args, f"{key}energy_kev")
        if window:
            with flags_for_parameters({"energy_kev": f"--{prefix}energy-kev LO HI"}):
                selection = selection & EnergyWindow(low_kev=window[0], high_kev=window[1])
        circle = getattr(args, f"{key}circle")
        if circle:
            with flags_for_parameters({"radius_mm": f"R_MM of --{prefix}circle"}):
                selection = selection & CircleRegion(x_mm=circle[0], y_mm=circle[1], radius_mm=circle[2])
        elongation = getattr(args, f"{key}min_elongation")
        if elongation is not None:
            selection = selection & ElongationCut(low=elongation)
    except FileNotFoundError as err:
        raise CommandError(f"selection file not found: {err.filename}") from None
    except SelectionError as err:
        raise CommandError(str(err)) from None
    return selection


def parse_run_spec(spec: str, allowed: tuple[str, ...]) -> tuple[str, dict[str, float]]:
    """``PATH[,key=value]...`` -> (path, {key: float}); keys must be in ``allowed``."""
    path, *items = spec.split(",")
    options = {}
    for item in items:
        name, sep, value = item.partition("=")
        if not sep or name not in allowed:
            raise CommandError(f"in '{spec}': expected key=value with key one of {list(allowed)} (got '{item}')")
        try:
            options[name] = float(value)
        except ValueError:
            raise CommandError(f"in '{spec}': '{name}' must be a number (got '{value}')") from None
    return path, options
