"""``trackfit show FILE --event N``: draw one event, with its reconstruction on top."""

from __future__ import annotations

from pathlib import Path

from ..cli import CommandError

#: trackfit.plotting.DEFAULT_MAX_PIXELS (checked by a test; kept here so that building the parser imports nothing)
DEFAULT_MAX_PIXELS = 20_000


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
    parser.add_argument("--pixel-map", metavar="MAP.h5",
                        help="pixel map (trackfit pixel-map): its pedestals are subtracted from files that are not "
                        "pedestal-subtracted, and its hot, dead and noisy pixels are ignored, as trackfit "
                        "reconstruct --pixel-map does (overrides the config's; default: the config's, none)")
    parser.add_argument("--no-overlay", action="store_true", help="draw the pixels only")
    parser.add_argument("--threshold-adc", type=float, default=None, metavar="ADC",
                        help="draw pixels at or below this value as outlines (default: the reconstruction "
                        "threshold when the overlay is drawn, else none)")
    parser.add_argument("--max-pixels", type=int, default=None, metavar="N",
                        help="most pixels drawn: an event of a larger ROI (a full-chip readout) is drawn around its "
                        "pixels above the threshold only, and refused when even that region is larger (default "
                        f"{DEFAULT_MAX_PIXELS}; matplotlib needs about a millisecond per pixel)")
    parser.set_defaults(func=run)


def run(args) -> int:
    import dataclasses

    import matplotlib

    from ..io.raw import open_raw
    from ..plotting import RegionTooLargeError, draw_event, region_to_draw

    if args.event < 0:
        raise CommandError(f"--event must be >= 0 (got {args.event})")
    max_pixels = DEFAULT_MAX_PIXELS if args.max_pixels is None else args.max_pixels
    if max_pixels < 1:
        raise CommandError(f"--max-pixels must be >= 1 (got {max_pixels})")
    from ..io.whole_files import check_output_file, save_figure_whole

    if args.output is not None:
        check_output_file(args.output, flag="-o/--output", overwrite=True)
    from ..recon import ReconConfig
    from ..recon.clusters import event_as_reconstructed

    with open_raw(args.file) as reader:
        event = reader[args.event]
        batch = reader.read_batch(event.index, event.index + 1, with_truth=False)
        run_info, subtracted = reader.run_info, reader.pedestal_subtracted
    config = ReconConfig.read_toml(args.config) if args.config else ReconConfig()
    if args.pixel_map:
        if not Path(args.pixel_map).exists():
            raise CommandError(f"--pixel-map: pixel map '{args.pixel_map}' does not exist")
        config = dataclasses.replace(config, pixel_map=args.pixel_map)
    if not subtracted and not config.pixel_map:
        raise CommandError(f"'{args.file}' holds raw ADC values (pedestal_subtracted = false): give the pixel map "
                           "with its pedestals (--pixel-map MAP.h5, measured with trackfit pixel-map)")
    # the pixels as the reconstruction sees them: pedestals subtracted, the map's bad pixels ignored
    event, ignored, pixel_thresholds = event_as_reconstructed(event, config, pedestal_subtracted=subtracted)
    result, provenance, outside, threshold = None, None, None, args.threshold_adc
    roi_line = f"event {event.index} (trigger {event.trigger_id}): ROI {int(event.roi[2])} x {int(event.roi[3])} = " \
               f"{len(event.signal)} pixels" + ("" if subtracted else ", pedestals of the pixel map subtracted") \
               + (f", {int(ignored.sum())} of them ignored (bad pixels)" if ignored.any() else "")
    if args.no_overlay:
        print(roi_line)
    else:
        from ..analysis.estimates import with_estimate
        from ..recon import reconstruct
        from ..recon.clusters import label_clusters

        table = with_estimate(reconstruct(batch, config, run_info=run_info))  # the settings' emission estimate
        result, provenance = table.row(0), table.provenance
        clusters = label_clusters(event, ignored, pixel_thresholds)
        outside = clusters.outside_main
        threshold = config.threshold_adc if threshold is None else threshold
        cut = (f"threshold_noise_rms = {config.threshold_noise_rms:g} x each pixel's noise"
               if config.pixel_map and config.threshold_noise_rms > 0 else f"threshold_adc = {config.threshold_adc:g}")
        print(f"{roi_line}, {int((clusters.labels > 0).sum())} above {cut} in "
              f"{clusters.n_clusters} cluster(s); main cluster {int(clusters.in_main.sum())} pixels "
              f"(n_pixels), {int(outside.sum())} pixels outside it (hatched)")
        print(_describe(result, provenance, config.emission_estimator))
    try:  # refused before anything is drawn
        region = region_to_draw(event, threshold_adc=threshold, outside_main=outside, max_pixels=max_pixels)
    except RegionTooLargeError as err:
        raise CommandError(f"{err}: draw a smaller part with --threshold-adc ADC above the noise, or allow more "
                           f"with --max-pixels N (about a millisecond each)") from None
    if not region.all():
        print(f"drawn: {int(region.sum())} of the {len(region)} ROI pixels, the region around the pixels above "
              f"the threshold (the ROI has more than --max-pixels {max_pixels})")
    interactive = matplotlib.get_backend().lower() not in ("agg", "pdf", "svg", "ps", "cairo", "template")
    output = args.output
    if output is None and not interactive:
        output = f"{Path(args.file).stem}_event{event.index}.png"
        check_output_file(output, flag="the default figure name (give -o PNG for another)", overwrite=True)
    if output is not None:
        matplotlib.use("agg")
    import matplotlib.pyplot as plt

    ax = draw_event(event, result=result, threshold_adc=threshold, outside_main=outside, provenance=provenance,
                    max_pixels=max_pixels)
    if output is None:
        plt.show()
    else:
        save_figure_whole(ax.figure, output, dpi=150)
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
