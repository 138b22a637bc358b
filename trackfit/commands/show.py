"""``trackfit show FILE --event N``: draw one event, with its reconstruction on top."""

from __future__ import annotations

from pathlib import Path


def register(subparsers):
    parser = subparsers.add_parser(
        "show", help="draw one event of a raw event file",
        description="Draw one event as filled hexagonal pixels (mm axes, colour bar in ADC counts) with the "
        "reconstructed centroid, conversion point, principal axis and emission direction on top.")
    parser.add_argument("file", help="raw event file")
    parser.add_argument("--event", "-e", type=int, required=True, metavar="N", help="event index (0-based)")
    parser.add_argument("-o", "--output", metavar="PNG",
                        help="write the figure to this file (default: a window if the display allows one, else "
                        "<file stem>_event<N>.png)")
    parser.add_argument("--config", metavar="TOML", help="reconstruction settings for the overlay")
    parser.add_argument("--no-overlay", action="store_true", help="draw the pixels only")
    parser.add_argument("--threshold-adc", type=float, default=None,
                        help="draw pixels at or below this value as outlines (default: the reconstruction "
                        "threshold when the overlay is drawn)")
    parser.set_defaults(func=run)


def run(args) -> int:
    import matplotlib

    from ..io.raw import open_raw
    from ..plotting import draw_event

    with open_raw(args.file) as reader:
        event = reader[args.event]
        batch = reader.read_batch(event.index, event.index + 1, with_truth=False)
    result, threshold = None, args.threshold_adc
    if not args.no_overlay:
        from ..recon import ReconConfig, reconstruct

        config = ReconConfig.read_toml(args.config) if args.config else ReconConfig()
        result = reconstruct(batch, config).row(0)
        threshold = config.threshold_adc if threshold is None else threshold
        print(_describe(result))
    interactive = matplotlib.get_backend().lower() not in ("agg", "pdf", "svg", "ps", "cairo", "template")
    output = args.output
    if output is None and not interactive:
        output = f"{Path(args.file).stem}_event{event.index}.png"
    if output is not None:
        matplotlib.use("agg")
    import matplotlib.pyplot as plt

    ax = draw_event(event, result=result, threshold_adc=threshold)
    if output is None:
        plt.show()
    else:
        ax.figure.savefig(output, dpi=150)
        print(f"wrote {output}")
    return 0


def _describe(row) -> str:
    import math

    keys = ("status", "n_pixels", "n_clusters", "pulse_height", "energy_kev", "centroid_x_mm", "centroid_y_mm",
            "conv_x_mm", "conv_y_mm", "axis_rad", "emission_rad")
    parts = []
    for key in keys:
        if key not in row:
            continue
        value = row[key]
        if key.endswith("_rad"):
            parts.append(f"{key[:-4]}_deg={math.degrees(value):.1f}")
        elif isinstance(value, float):
            parts.append(f"{key}={value:.4g}")
        else:
            parts.append(f"{key}={value}")
    return "reconstruction: " + ", ".join(parts)
