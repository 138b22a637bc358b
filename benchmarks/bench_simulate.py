"""Track simulator throughput at 6 keV, per core, against baselines measured in the same run.

Run:  python benchmarks/bench_simulate.py [--events 40000] [--preset hedme-1atm-1cm] [--energy-kev 6.0]

Prints events per second of ``trackfit.simulate.run`` (one process, one thread: numba kernels are not
parallel, so this is the per-core figure; the target is >= 10,000 events/s at 6 keV) and of its parts, and
the ratio against the plain-Python twin of the event kernel (``trackfit.simulate._reference``), run on a few hundred
events of the same configuration. The machine is shared, so absolute numbers are noisy; the ratios are the
comparable figures.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from trackfit.simulate import _reference, load_preset, run
from trackfit.simulate.engine import _gain_drift, _Simulator


def _best_of(repeats, func):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=40_000)
    parser.add_argument("--preset", default="hedme-1atm-1cm")
    parser.add_argument("--energy-kev", type=float, default=6.0)
    parser.add_argument("--twin-events", type=int, default=200)
    args = parser.parse_args(argv)
    config = load_preset(args.preset).with_monochromatic(energy_kev=args.energy_kev)
    run(config, 50, rng=0)                                   # compile (or load) the kernels

    t_run = _best_of(2, lambda: run(config, args.events, rng=1))
    sim = _Simulator(config, np.random.default_rng(2))
    t_photons = _best_of(3, lambda: sim.photons.sample(args.events, sim.rng))
    photons = sim.photons.sample(args.twin_events, sim.rng)
    gain = _gain_drift(config, photons.time_s)
    t_twin = _best_of(1, lambda: _reference.simulate_events(np.random.default_rng(3), photons, gain, sim.mixture,
                                                            config, sim.pixel_gain))

    rate_run = args.events / t_run
    rate_photons = args.events / t_photons
    rate_twin = args.twin_events / t_twin
    print(f"config: {args.preset} at {args.energy_kev} keV, {args.events} events, one core")
    print(f"{'stage':42s} {'events/s':>12s} {'ratio':>10s}")
    print(f"{'plain-Python twin of the event kernel':42s} {rate_twin:12.0f} {1.0:10.2f}")
    print(f"{'photon stage (numpy, vectorised)':42s} {rate_photons:12.0f} {rate_photons / rate_twin:10.1f}")
    print(f"{'trackfit.simulate.run (whole chain)':42s} {rate_run:12.0f} {rate_run / rate_twin:10.1f}")
    print(f"target: >= 10000 events/s per core -> {'met' if rate_run >= 10_000 else 'NOT met'} "
          f"({rate_run / 10_000:.2f} x target)")


if __name__ == "__main__":
    main()
