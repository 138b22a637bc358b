"""Speed of the emission estimates, as ratios against the two-stage analysis measured in the same run.

Run:  python benchmarks/bench_estimators.py [--events 20000] [--skeleton-events 2000]

For simulated 100 %-polarized runs of the two simulator designs (He/DME at 3.7 and 5.9 keV, Ar/DME at 20 and
30 keV), prints the events/s of ``reconstruct`` (one thread, events in memory) with ``emission_estimator`` =
``"two-stage"``, ``"adaptive"`` and ``"skeleton"``, and each one's time relative to the two-stage analysis. The
compiled estimates are timed as the best of three runs after a first run that compiles them; the skeleton estimate
(Python and scikit-image per long track) once, on fewer events. The machine may be shared with other work: read the
ratios, not the absolute numbers.
"""

from __future__ import annotations

import argparse
import time

from trackfit import ReconConfig, reconstruct
from trackfit.design import polarized_beam
from trackfit.simulate import load_preset, run

POINTS = (("hedme-1atm-1cm", 3.7), ("hedme-1atm-1cm", 5.9), ("ardme-3atm-3cm", 20.0), ("ardme-3atm-3cm", 30.0))


def seconds(batch, config, run_info, repeats):
    reconstruct(batch, config, run_info=run_info)  # compile, or load from numba's cache
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        reconstruct(batch, config, run_info=run_info)
        best = min(best, time.perf_counter() - t)
    return best


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=20_000, help="events per point for the compiled estimates")
    parser.add_argument("--skeleton-events", type=int, default=2_000, help="events per point for the skeleton")
    args = parser.parse_args(argv)
    print(f"{'design':<16}{'E (keV)':>8}{'two-stage ev/s':>16}{'adaptive ev/s':>15}{'ratio':>7}"
          f"{'skeleton ev/s':>15}{'ratio':>8}")
    for preset, energy in POINTS:
        result = run(polarized_beam(load_preset(preset), energy), args.events, rng=1)
        batch, info = result.batch, result.run_info()
        two = seconds(batch, ReconConfig(emission_estimator="two-stage"), info, 3) / len(batch)
        adaptive = seconds(batch, ReconConfig(emission_estimator="adaptive"), info, 3) / len(batch)
        small = batch.select(range(min(args.skeleton_events, len(batch))))
        skeleton = seconds(small, ReconConfig(emission_estimator="skeleton"), info, 1) / len(small)
        print(f"{preset:<16}{energy:>8g}{1 / two:>16,.0f}{1 / adaptive:>15,.0f}{adaptive / two:>7.2f}"
              f"{1 / skeleton:>15,.0f}{skeleton / two:>8.0f}")


if __name__ == "__main__":
    main()
