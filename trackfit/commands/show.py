"""``trackfit show FILE --event N``: draw one event, with its reconstruction on top."""

from __future__ import annotations

from pathlib import Path

from ..cli import CommandError


def register(subparsers):
    parser = subparsers.add_parser(
        "show", help="draw one event of a raw event file",
        description="Draw one event as filled hexagonal pixels (mm axes, colour bar in ADC counts) with the "
        "reconstructed centroid, conversion point, principal axis and emission direction (of the settings' "
        "emission_estimator) on top. Pixels above "
        "the threshold that are not in the main cluster (the only one the reconstruction uses) are hatched. The "
        "title and the printout give both counts: the ROI pixels of the event and the pixels of its main cluster.")
    parser.add_argument("file", help="raw event file")
    parser.add_argument("--event", "-e", type=int, required=True, metavar="N", help="event index (0-based)")
    parser.add_argument("-o", "--output", metavar="PNG",
                        help="write the figure to this file (default: a window if the display allows one, else "
                        "<file stem>_event<N>.png)")
    parser.add_argument("--config", metavar="TOML",
                        help="reconstruction settings for the overlay (default: the built-in settings, see "
                        "trackfit reconstruct --print-settings)")
    parser.add_argument("--no-overlay", action="store_true", help="draw the pixels only")
    parser.add_argument("--threshold-adc", type=float, default=None, metavar="ADC",
                        help="draw pixels at or below this value as outlines (default: the reconstruction "
                        "threshold when the overlay is drawn, else none)")
    parser.set_defaults(func=run)


def run(args) -> int:
    import matplotlib

    from ..io.raw import open_raw
    from ..plotting import draw_event

    if args.event < 0:
        raise CommandError(f"--event must be >= 0 (got {args.event})")
    with open_raw(args.file) as reader:
        event = reader[args.event]
        batch = reader.read_batch(event.index, event.index + 1, with_truth=False)
        run_info = reader.run_info
    result, provenance, outside, threshold = None, None, None, args.threshold_adc
    roi_line = f"event {event.index} (trigger {event.trigger_id}): ROI {int(event.roi[2])} x {int(event.roi[3])} = " \
               f"{len(event.signal)} pixels"
    if args.no_overlay:
        print(roi_line)
    else:
        from ..analysis.estimates import with_estimate
        from ..recon import ReconConfig, reconstruct
        from ..recon.clusters import event_clusters

        config = ReconConfig.read_toml(args.config) if args.config else ReconConfig()
        table = with_estimate(reconstruct(batch, config, run_info=run_info))  # the settings' emission estimate
        result, provenance = table.row(0), table.provenance
        clusters = event_clusters(event, config)
        outside = clusters.outside_main
        threshold = config.threshold_adc if threshold is None else threshold
        print(f"{roi_line}, {int((clusters.labels > 0).sum())} above threshold_adc = {config.threshold_adc:g} in "
              f"{clusters.n_clusters} cluster(s); main cluster {int(clusters.in_main.sum())} pixels "
              f"(n_pixels), {int(outside.sum())} pixels outside it (hatched)")
        print(_describe(result, provenance, config.emission_estimator))
    interactive = matplotlib.get_backend().lower() not in ("agg", "pdf", "svg", "ps", "cairo", "template")
    output = args.output
    if output is None and not interactive:
        output = f"{Path(args.file).stem}_event{event.index}.png"
    if output is not None:
        matplotlib.use("agg")
    import matplotlib.pyplot as plt

    ax = draw_event(event, result=result, threshold_adc=threshold, outside_main=outside, provenance=provenance)
    if output is None:
        plt.show()
    else:
        ax.figure.savefig(output, dpi=150)
        print(f"wrote {output}")
    return 0


def _describe(row, provenance, estimator: str) -> str:
    import math

    from ..io.energy_label import energy_is_calibrated

    keys = ("status", "n_pixels", "n_clusters", "pulse_height", "energy_kev", "centroid_x_mm", "centroid_y_mm",
            "conv_x_mm", "conv_y_mm", "axis_rad", "emission_rad")
    parts = []
    for key in keys:
        if key not in row:
            continue
        value = row[key]
        if key.endswith("_rad"):
            parts.append(f"{key[:-4]}_deg={math.degrees(value):.1f}")
        elif key == "energy_kev" and not energy_is_calibrated(provenance):
            parts.append(f"{key}={value:.4g} (uncalibrated)")
        elif isinstance(value, float):
            parts.append(f"{key}={value:.4g}")
        else:
            parts.append(f"{key}={value}")
    return f"reconstruction (main cluster, {estimator} estimate): " + ", ".join(parts)
