"""Make the quality-factor tables of docs/methods.md §11 (simulated values, measured with trackfit.quality_study).

Run from the repository root (about 20 minutes on one core; the skeleton estimate takes most of it):

    python docs/quality_tables.py [--events 50000] [--seed 20240] [--json study.json] [--figures DIR] > tables.md

For each simulator design (He/DME at 2.7, 3.7, 5.9 and 8 keV; Ar/DME at 10, 20 and 30 keV) it compares, against the
published two-stage analysis with default settings and no weights: the two-stage analysis with the best single
global setting of the start search and second pass on the tuning events (:data:`TUNED_TWO_STAGE`), with the
ellipticity weights and with the response weights; the adaptive estimate alone and with both weights; and, for the
argon design, the skeleton estimate alone and with the response weights. The seed must differ from the seeds the
estimates were tuned on (docs/methods.md §11).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from trackfit import ReconConfig
from trackfit.quality_study import StudyMethod, run_quality_study

ENERGIES_KEV = {"hedme-1atm-1cm": [2.7, 3.7, 5.9, 8.0], "ardme-3atm-3cm": [10.0, 20.0, 30.0]}
#: the best single setting of the two-stage analysis on the tuning events (pooled over both designs)
TUNED_TWO_STAGE = ReconConfig(start_search_inner_rms=1.25, start_search_outer_rms=3.5, second_pass_length_mm=0.05)


def methods_for(preset: str) -> list[StudyMethod]:
    methods = [StudyMethod(name="two-stage, tuned setting", recon=TUNED_TWO_STAGE),
               StudyMethod(name="two-stage + ellipticity", weights="ellipticity"),
               StudyMethod(name="two-stage + response", weights="response"),
               StudyMethod(name="adaptive", estimator="adaptive"),
               StudyMethod(name="adaptive + ellipticity", estimator="adaptive", weights="ellipticity"),
               StudyMethod(name="adaptive + response", estimator="adaptive", weights="response")]
    if preset.startswith("ardme"):
        methods += [StudyMethod(name="skeleton", estimator="skeleton"),
                    StudyMethod(name="skeleton + response", estimator="skeleton", weights="response")]
    return methods


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=50_000, help="triggered events per run")
    parser.add_argument("--seed", type=int, default=20240)
    parser.add_argument("--json", help="write every row as JSON")
    parser.add_argument("--figures", help="folder for the figure of each design")
    args = parser.parse_args(argv)
    results = {}
    for preset, energies in ENERGIES_KEV.items():
        study = run_quality_study(preset, energies, methods_for(preset), n_events=args.events, seed=args.seed,
                                  progress=True)
        results[preset] = study.to_dict()
        print(f"\n### {preset}\n")
        print(study.to_markdown())
        print(f"\nbest: {study.best_method()}")
        if args.figures:
            Path(args.figures).mkdir(parents=True, exist_ok=True)
            study.plot().savefig(Path(args.figures) / f"quality_{preset}.png", dpi=110)
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1) + "\n")


if __name__ == "__main__":
    main()
