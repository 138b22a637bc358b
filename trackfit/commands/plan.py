"""``trackfit plan RESPONSE.h5 [RESPONSE2.h5 ...] --flux F --area-cm2 A --band-kev LO HI --exposure-s T ...``.

For each detector response (``trackfit response``): source and background counts, effective modulation factor,
MDP99 for the exposure, the exposure to reach a target MDP, MDP99 per sub-band and the data volume; printed as a
table, written as JSON (``--json``) and figures (``--figures``). A thin layer over :mod:`trackfit.planner`.
"""

from __future__ import annotations

from pathlib import Path

from ..cli import CommandError, translate_parameters

#: Observation field -> the flag that sets it (errors name the flag)
_FLAGS = {"flux_at_1kev": "--flux", "photon_index": "--photon-index", "area_cm2": "--area-cm2",
          "area_values_cm2": "--area-cm2", "area_energies_kev": "--area-cm2", "spectrum_flux": "--spectrum",
          "spectrum_energies_kev": "--spectrum", "background_per_cm2_s_kev": "--background",
          "background_region_cm2": "--background-region-cm2", "band_kev": "--band-kev", "exposure_s": "--exposure-s",
          "target_mdp": "--target-mdp", "absorption_column_cm2": "--absorption-cm2",
          "band_edges_kev": "--band-edges-kev", "compressed_fraction": "--compressed-fraction"}


def register(subparsers):
    parser = subparsers.add_parser(
        "plan", help="plan an observation: MDP99, exposure to a target MDP and bytes per day of each design",
        description="For each detector response (trackfit response): detected source and background counts in "
        "the band, the effective modulation factor, MDP99 for the exposure (Weisskopf et al. 2010, with "
        "background), the exposure that reaches --target-mdp, MDP99 per sub-band, and the data volume of the "
        "readout (events/s, bytes/s, GB/day raw and compressed).")
    parser.add_argument("responses", nargs="+", metavar="RESPONSE.h5", help="response file(s) of the designs")
    source = parser.add_argument_group("source")
    source.add_argument("--flux", type=float, metavar="F",
                        help="power law: photons cm^-2 s^-1 keV^-1 at 1 keV (or give --spectrum) (default: none)")
    source.add_argument("--photon-index", type=float, metavar="G", help="power law: F(E) = F * E^-G (default 2)")
    source.add_argument("--spectrum", metavar="CSV", help="table of energy_kev and photon flux (photons cm^-2 s^-1 "
                        "keV^-1) instead of the power law (default: none)")
    source.add_argument("--absorption-cm2", type=float, metavar="NH", help="hydrogen column density of interstellar "
                        "gas in front of the source, atoms per cm^2 (default 0)")
    instrument = parser.add_argument_group("instrument and background")
    instrument.add_argument("--area-cm2", metavar="A", help="effective collecting area: a number in cm^2, or a CSV "
                            "of energy_kev and area_cm2 (a mirror; the window of a bare detector) (default: none)")
    instrument.add_argument("--background", type=float, metavar="B", help="background events that pass the "
                            "selection, per cm^2 per s per keV (default 0)")
    instrument.add_argument("--background-region-cm2", type=float, metavar="R",
                            help="area of the source region on the detector (default: each design's whole chip)")
    observation = parser.add_argument_group("observation")
    observation.add_argument("--band-kev", nargs=2, type=float, metavar=("LO", "HI"), help="energy band (default: "
                             "none; required unless --observation gives it)")
    observation.add_argument("--exposure-s", type=float, metavar="T", help="exposure in seconds (default: none; "
                             "required unless --observation gives it)")
    observation.add_argument("--target-mdp", type=float, metavar="M", help="MDP99 to reach, a fraction (0.05 for "
                             "5 %%) (default: none)")
    observation.add_argument("--band-edges-kev", nargs="+", type=float, metavar="E", help="edges of the sub-bands "
                             "with their own MDP99, from LO to HI (default: four bands of equal width in ln E)")
    observation.add_argument("--compressed-fraction", type=float, metavar="F", help="compressed / raw size of the "
                             "data for the compressed volume (default 0.44: zstd on pedestal noise, "
                             "docs/raw-format.md)")
    observation.add_argument("--observation", metavar="TOML", help="an [observation] file (trackfit.planner."
                             "Observation keys); flags override it (default: none)")
    out = parser.add_argument_group("output")
    out.add_argument("--name", action="append", default=[], metavar="NAME",
                     help="label of each response, in order (repeatable) (default: the names stored in the files)")
    out.add_argument("--json", metavar="OUT.json", help="write the plan as JSON (default: none)")
    out.add_argument("--figures", metavar="DIR", help="write MDP99 vs exposure, mu(E)*eff(E) and the detected "
                     "spectra as PNG into DIR (default: none)")
    parser.set_defaults(func=run)


def _observation(args):
    from ..planner import Observation, read_two_column_csv

    values = Observation.read_toml_values(args.observation) if args.observation else {}
    if args.spectrum is not None:
        if args.flux is not None:
            raise CommandError("give the source as --flux (a power law) or --spectrum CSV, not both")
        energies, flux = read_two_column_csv(args.spectrum, what="spectrum (--spectrum)")
        values.pop("flux_at_1kev", None)
        values.update(spectrum_energies_kev=tuple(energies), spectrum_flux=tuple(flux))
    elif args.flux is not None:
        values.pop("spectrum_energies_kev", None)
        values.pop("spectrum_flux", None)
        values["flux_at_1kev"] = args.flux
    if args.area_cm2 is not None:
        values.pop("area_cm2", None)
        values.pop("area_energies_kev", None)
        values.pop("area_values_cm2", None)
        try:
            values["area_cm2"] = float(args.area_cm2)
        except ValueError:
            energies, area = read_two_column_csv(args.area_cm2, what="area (--area-cm2)")
            values.update(area_energies_kev=tuple(energies), area_values_cm2=tuple(area))
    for flag_value, key in ((args.photon_index, "photon_index"), (args.absorption_cm2, "absorption_column_cm2"),
                            (args.background, "background_per_cm2_s_kev"),
                            (args.background_region_cm2, "background_region_cm2"),
                            (args.band_kev, "band_kev"), (args.exposure_s, "exposure_s"),
                            (args.target_mdp, "target_mdp"), (args.band_edges_kev, "band_edges_kev"),
                            (args.compressed_fraction, "compressed_fraction")):
        if flag_value is not None:
            values[key] = tuple(flag_value) if isinstance(flag_value, list) else flag_value
    for key, flag in (("band_kev", "--band-kev LO HI"), ("exposure_s", "--exposure-s T")):
        if key not in values:
            raise CommandError(f"{flag} is required (or an --observation file that gives it)")
    if "flux_at_1kev" not in values and "spectrum_energies_kev" not in values:
        raise CommandError("give the source: --flux F (power law, with --photon-index) or --spectrum CSV")
    if "area_cm2" not in values and "area_energies_kev" not in values:
        raise CommandError("give the collecting area: --area-cm2 A (a number or a CSV)")
    target = values.get("target_mdp")
    if target is not None and not 0 < target < 1:
        raise CommandError(f"--target-mdp must be a fraction in (0, 1), e.g. 0.05 for 5 % (got {target:g})")
    try:
        return Observation(**values)
    except ValueError as err:
        raise CommandError(translate_parameters(str(err), _FLAGS)) from None


def run(args) -> int:
    from ..io.whole_files import check_output_file, make_output_folder
    from ..planner import plan_observation

    observation = _observation(args)
    for path in args.responses:
        if not Path(path).exists():
            raise FileNotFoundError(f"response file '{path}' does not exist")
    if args.name and len(args.name) != len(args.responses):
        raise CommandError(f"--name given {len(args.name)} times for {len(args.responses)} response files")
    if args.json:
        check_output_file(args.json, flag="--json", overwrite=True)
    if args.figures:
        make_output_folder(args.figures, flag="--figures")
    try:
        plan = plan_observation(args.responses, observation, names=args.name or None)
    except ValueError as err:
        text = translate_parameters(str(err), _FLAGS)
        raise CommandError("--band-kev " + text[len("band "):] if text.startswith("band ") else text) from None
    print(plan.summary())
    if args.json:
        print(f"wrote {plan.write_json(args.json)}")
    if args.figures:
        from ..planner_figures import save_plan_figures

        paths = save_plan_figures(plan, args.figures)
        print(f"wrote {len(paths)} figures to {args.figures}/")
    return 0
