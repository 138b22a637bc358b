"""Selection options shared by the analysis commands: a TOML selection file and/or a few flags.

Every selection starts with the default one (events with an emission angle and no failure bit); the options add
cuts to it, they never replace it.
"""

from __future__ import annotations

from ..cli import CommandError, flags_for_parameters

#: the default selection in the words of ``--help``
DEFAULT_SELECTION_HELP = ("Default selection, always applied first: events with an emission angle and no failure "
                          "status bit (failures: MALFORMED_INPUT, NO_SIGNAL, TOO_FEW_PIXELS, SINGLE_PIXEL, ROUND, "
                          "NOT_FINITE; see trackfit.recon.status). Warning bits (e.g. ROI_BORDER, a track touching "
                          "the ROI edge) are kept unless --{prefix}reject-warnings is given. Every option below adds "
                          "a cut to it.")


def add_cut_options(parser, *, prefix: str = "", what: str = "events", calibrated: bool = True) -> None:
    """Add ``--{prefix}cuts TOML``, ``--{prefix}reject-warnings``, ``--{prefix}energy-kev LO HI``,
    ``--{prefix}circle X Y R`` and ``--{prefix}min-elongation`` to a parser (``calibrated``: whether energy cuts
    see calibrated energies or the table's own)."""
    group = parser.add_argument_group(f"selection of {what}" + (f" ({prefix.rstrip('-')})" if prefix else ""),
                                      description=DEFAULT_SELECTION_HELP.format(prefix=prefix))
    group.add_argument(f"--{prefix}cuts", metavar="TOML", help="selection file (keys: reject_warnings, status, "
                       "allowed_status, energy_kev, n_pixels, elongation, [region], [range]; see "
                       "trackfit.analysis.selection; default: none)")
    group.add_argument(f"--{prefix}reject-warnings", action="store_true",
                       help="also reject events with a warning status bit (then status == 0 only)")
    group.add_argument(f"--{prefix}energy-kev", nargs=2, type=float, metavar=("LO", "HI"),
                       help="energy window in keV, LO <= energy_kev < HI (" + (
                           "energies after the calibration is applied" if calibrated else
                           "the table's own energy_kev, before this calibration") + "; default: no energy cut)")
    group.add_argument(f"--{prefix}circle", nargs=3, type=float, metavar=("X_MM", "Y_MM", "R_MM"),
                       help="keep conversion points within R_MM of (X_MM, Y_MM) (default: the whole chip)")
    group.add_argument(f"--{prefix}min-elongation", type=float, metavar="RATIO",
                       help="keep tracks with m2_major_mm2 / m2_minor_mm2 >= RATIO (default: no elongation cut)")


def selection_from_args(args, *, prefix: str = ""):
    """The selection given by the options of :func:`add_cut_options`: the default selection first, then every cut
    given (all combined with 'and')."""
    from ..analysis import CircleRegion, ElongationCut, EnergyWindow, Everything, SelectionError, UsableEvents
    from ..analysis.selection import read_selection, with_default

    key = prefix.replace("-", "_")
    selection = Everything()
    try:
        cuts = getattr(args, f"{key}cuts")
        if cuts:
            selection = selection & read_selection(cuts)
        if getattr(args, f"{key}reject_warnings"):
            selection = selection & UsableEvents(reject_warnings=True)
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
    return with_default(selection)


def has_cut_options(args, *, prefix: str = "") -> bool:
    """Whether any option of :func:`add_cut_options` with this prefix was given."""
    key = prefix.replace("-", "_")
    return any(getattr(args, f"{key}{name}") for name in ("cuts", "reject_warnings", "energy_kev", "circle")) or \
        getattr(args, f"{key}min_elongation") is not None


def print_warnings(command: str, caught) -> None:
    """Print warnings recorded while a command ran, one per line on stderr (no Python source line)."""
    import sys

    seen = set()
    for item in caught:
        text = str(item.message)
        if text not in seen:
            seen.add(text)
            print(f"trackfit {command}: warning: {text}", file=sys.stderr)


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
