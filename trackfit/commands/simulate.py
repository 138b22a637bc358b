"""``trackfit simulate``: run the photoelectron track simulator and write a raw event file with truth."""

from __future__ import annotations

import argparse

from ..cli import flags_for_parameters

#: config keys set by the flags that override the source (errors name the flag)
FLAG_PARAMETERS = {"source.line_energies_kev": "--energy-kev", "source.polarization_degree": "--polarization-degree",
                   "source.polarization_angle_deg": "--polarization-angle-deg"}


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "simulate",
        usage="trackfit simulate (CONFIG.toml | --preset NAME) -n N -o RAW.h5 [options]\n"
              "       trackfit simulate --list-presets",
        help="simulate photoelectron tracks and write a raw event file with per-event truth",
        description="Simulate a detector given by a TOML config or a named preset; the output is a raw event "
        "file (format v1) with the /truth group and the full config in /run. Flags override the source with a "
        "monochromatic line.",
    )
    parser.add_argument("config", nargs="?", metavar="CONFIG.toml", help="simulation config (TOML)")
    parser.add_argument("--preset", metavar="NAME",
                        help="a shipped preset instead of CONFIG.toml (one of the two is required)")
    parser.add_argument("--list-presets", action="store_true", help="list the shipped presets and exit")
    parser.add_argument("-n", "--n-events", type=int, metavar="N", help="triggered events to write (required)")
    parser.add_argument("-o", "--output", metavar="RAW.h5", help="output raw event file (required)")
    parser.add_argument("--seed", type=int, default=None,
                        help="random seed (same seed: bit-identical file; default: a fresh seed each run)")
    parser.add_argument("--energy-kev", type=float, default=None, metavar="E",
                        help="monochromatic photon energy in keV (default: the config's source spectrum)")
    parser.add_argument("--polarization-degree", type=float, default=None, metavar="P",
                        help="0 to 1 (default: the config's source)")
    parser.add_argument("--polarization-angle-deg", type=float, default=None, metavar="A",
                        help="polarization angle in the detector frame, degrees from +x towards +y "
                        "(default: the config's source)")
    parser.add_argument("--lab-pixels", metavar="LAB.toml",
                        help="read the events out through a lab-like chip: per-pixel pedestals and noise, hot, dead "
                        "and noisy pixels, optionally not pedestal-subtracted ([lab_pixels] table, "
                        "trackfit.simulate.labpixels.LabPixelConfig); the chip truth goes to /pixel_truth")
    parser.add_argument("--pedestal-run", action="store_true",
                        help="write N random-trigger events without a source instead (each reads the whole chip)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    parser.add_argument("--no-progress", action="store_true", help="do not show a progress bar")
    parser.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    from ..cli import CommandError
    from ..simulate import SimConfig, list_presets, load_preset, run

    if args.list_presets:
        for name in list_presets():
            print(f"{name:20s} {load_preset(name).description}")
        return 0
    if (args.config is None) == (args.preset is None):
        raise CommandError("give either CONFIG.toml or --preset NAME (see --list-presets)")
    if args.n_events is None:
        raise CommandError("-n/--n-events N is required: the number of triggered events to write")
    if args.n_events < 1:
        raise CommandError(f"-n/--n-events must be >= 1 (got {args.n_events})")
    if not args.output:
        raise CommandError("-o/--output RAW.h5 is required")
    config = load_preset(args.preset) if args.preset else SimConfig.load(args.config)
    with flags_for_parameters(FLAG_PARAMETERS):
        config = config.with_monochromatic(energy_kev=args.energy_kev, polarization_degree=args.polarization_degree,
                                           polarization_angle_deg=args.polarization_angle_deg)
    from pathlib import Path

    from ..io.whole_files import check_output_file

    check_output_file(args.output, flag="-o/--output", overwrite=args.overwrite)  # before the simulation runs
    from tqdm import tqdm

    design = args.preset if args.preset else Path(args.config).name
    if args.lab_pixels or args.pedestal_run:
        return _lab(args, config, design)
    with tqdm(total=args.n_events, unit=" events", desc="simulate", disable=args.no_progress) as bar:
        result = run(config, args.n_events, rng=args.seed, progress=bar.update, design=design)
    path = result.write(args.output, overwrite=args.overwrite)
    print(f"wrote {len(result.batch)} events to {path} ({result.n_converted} photons converted, "
          f"{result.n_not_triggered} did not trigger; detection efficiency {result.detection_efficiency:.4f})")
    return 0


def _lab(args, config, design) -> int:
    from tqdm import tqdm

    from ..simulate.labpixels import LabPixelConfig, simulate_lab_run, write_pedestal_run

    readout = config.readout
    lab = (LabPixelConfig.load(args.lab_pixels) if args.lab_pixels
           else LabPixelConfig(noise_mean_adc=readout.noise_electrons / readout.electrons_per_adc))
    if args.pedestal_run:
        path = write_pedestal_run(args.output, lab, args.n_events, rng=args.seed, grid=config.grid,
                                  overwrite=args.overwrite)
    else:
        with tqdm(total=args.n_events, unit=" events", desc="simulate", disable=args.no_progress) as bar:
            result = simulate_lab_run(config, lab, args.n_events, rng=args.seed, progress=bar.update, design=design)
        path = result.write(args.output, overwrite=args.overwrite)
    kind = "random-trigger (pedestal run)" if args.pedestal_run else "track"
    print(f"wrote {args.n_events} {kind} events to {path} through a lab-like chip "
          f"({lab.n_hot} hot, {lab.n_dead} dead, {lab.n_noisy} noisy pixels; "
          f"{'pedestal-subtracted' if lab.pedestal_subtracted else 'raw ADC values with pedestals'})")
    return 0
