"""``trackfit pixel-map RAW... -o MAP.h5``: pedestal, noise, occupancy and bad-pixel codes measured from raw files."""

from __future__ import annotations

import json
from pathlib import Path

from ..cli import CommandError

#: command-line flag -> PixelMapSettings field
FLAGS = {
    "--min-samples": "min_samples",
    "--clearance-pixels": "track_clearance_pixels",
    "--seed-rms": "track_seed_noise_rms",
    "--occupancy-rms": "occupancy_noise_rms",
    "--hot-p-value": "hot_p_value",
}


def register(subparsers):
    parser = subparsers.add_parser(
        "pixel-map", help="measure pixel pedestals, noise and bad pixels from raw event files",
        description="Measure the pedestal, noise (robust: median and MAD), occupancy and a bad-pixel code "
        "(ok, hot, dead, noisy, too few samples) of every pixel of one chip, from pedestal runs (random triggers) "
        "and/or ordinary track runs (pixels far from the tracks). Writes the map (docs/pixel-map-format.md), a "
        "figure of it, and prints a summary. Use the map with `trackfit reconstruct --pixel-map MAP.h5`.")
    parser.add_argument("raw", nargs="+", metavar="RAW", help="raw event file(s) of one chip")
    parser.add_argument("-o", "--output", required=True, metavar="MAP.h5", help="pixel-map file to write")
    parser.add_argument("--settings", metavar="TOML", help="measurement settings (trackfit.pixels.PixelMapSettings "
                        "keys, in a [pixel_map] table or at the top level); the flags below override them")
    parser.add_argument("--min-samples", type=int, metavar="N",
                        help="pixels with fewer noise samples are not judged (default 50)")
    parser.add_argument("--clearance-pixels", type=int, metavar="N",
                        help="in track runs, skip pixels within N steps of a track (default 2)")
    parser.add_argument("--seed-rms", type=float, metavar="K",
                        help="in track runs, a track pixel exceeds K times the chip's noise (default 4)")
    parser.add_argument("--occupancy-rms", type=float, metavar="K",
                        help="occupancy counts samples above K times the pixel's own noise (default 5)")
    parser.add_argument("--hot-p-value", type=float, metavar="P",
                        help="hot when the binomial probability of the pixel's occupancy is below P (default 1e-9)")
    figure = parser.add_mutually_exclusive_group()
    figure.add_argument("--figure", metavar="PNG", help="figure of the map (default: MAP with the suffix .png)")
    figure.add_argument("--no-figure", action="store_true", help="do not draw the figure")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")
    parser.set_defaults(func=run)


def _settings(args):
    from ..pixels import PixelMapSettings

    base = PixelMapSettings.read_toml(args.settings) if args.settings else PixelMapSettings()
    overrides = {field: getattr(args, flag[2:].replace("-", "_")) for flag, field in FLAGS.items()}
    overrides = {k: v for k, v in overrides.items() if v is not None}
    try:
        return PixelMapSettings(**{**base.to_dict(), **overrides})
    except ValueError as err:
        message = str(err)
        for flag, field in FLAGS.items():
            if field in overrides:
                message = message.replace(f"'{field}'", flag)
        raise CommandError(message) from None


def run(args) -> int:
    from ..io.pixelmap import write_pixel_map
    from ..io.whole_files import check_output_file, save_figure_whole
    from ..pixels import measure_pixel_map

    settings = _settings(args)
    raws = [Path(p) for p in args.raw]
    for raw in raws:
        if not raw.exists():
            raise FileNotFoundError(f"raw event file '{raw}' does not exist")
    out = Path(args.output)
    figure = None if args.no_figure else Path(args.figure) if args.figure else out.with_suffix(".png")
    for path in (out, figure):
        if path is not None and path.exists() and not args.overwrite:
            raise FileExistsError(f"'{path}' exists; pass --overwrite to replace it")
        if path is not None and path.resolve() in {r.resolve() for r in raws}:
            raise CommandError(f"output '{path}' would overwrite an input file")
    check_output_file(out, flag="-o/--output", overwrite=args.overwrite)
    if figure is not None:
        check_output_file(figure, flag="--figure" if args.figure else "the figure (MAP with .png; --figure PNG "
                          "or --no-figure)", overwrite=args.overwrite)
    pixel_map = measure_pixel_map(raws, settings, progress=not args.no_progress)
    write_pixel_map(out, pixel_map, overwrite=args.overwrite)
    from ..io.pixelmap import read_pixel_map

    pixel_map = read_pixel_map(out)  # what was written, with its path
    if figure is not None:
        from ..pixelmap_figures import plot_pixel_map_overview

        save_figure_whole(plot_pixel_map_overview(pixel_map), figure, dpi=110)
    if args.json:
        print(json.dumps({"path": str(out), "fingerprint": pixel_map.fingerprint, "figure": str(figure or ""),
                          **pixel_map.summary()}, indent=2, default=float))
    else:
        print(pixel_map.summary_text())
        print(f"wrote {out}" + (f" and {figure}" if figure is not None else ""))
    return 0
