"""Make the sample files of ``sample_data/`` with the track simulator (fixed seeds: reruns are bit-identical).

Run from the repository root:  python sample_data/make_sample_data.py [--out sample_data] [--scale 1.0]

Every file is the ``hedme-1atm-1cm`` preset (He/DME 20/80, 1 atm, 1 cm gap, 50 µm hexagonal pixels) with the
source changed as listed in ``RUNS``. To keep the files small they are written with data-acquisition zero
suppression at 150 electrons (3 × the 50 e⁻ pixel noise): ROI pixels below it are stored as 0. The scenarios are
invented demo data, not measurements.
"""

from __future__ import annotations

import argparse
import dataclasses
from pathlib import Path

from trackfit.simulate import load_preset, run

#: file name -> (events, seed, source changes, one-line description)
RUNS = {
    "fe55_flatfield_unpolarized.h5": (
        9_000, 101, dict(beam="flat", field_size_mm=(10.0, 10.0)),
        "Fe-55 Mn K lines (5.90/5.89/6.49 keV), unpolarized, flat field over 10 x 10 mm",
    ),
    "pol100_3p7kev_0deg.h5": (
        8_000, 102, dict(spectrum="lines", line_energies_kev=(3.7,), line_weights=(1.0,), polarization_degree=1.0,
                         polarization_angle_deg=0.0, beam="gaussian", beam_sigma_mm=0.5),
        "3.7 keV, 100 % polarized at 0 deg, Gaussian spot (sigma 0.5 mm) at the chip centre",
    ),
    "pol100_5p9kev_30deg.h5": (
        9_000, 103, dict(spectrum="lines", line_energies_kev=(5.9,), line_weights=(1.0,), polarization_degree=1.0,
                          polarization_angle_deg=30.0, beam="gaussian", beam_sigma_mm=0.5),
        "5.9 keV, 100 % polarized at 30 deg, Gaussian spot (sigma 0.5 mm) at the chip centre",
    ),
    "pol100_5p9kev_120deg_short.h5": (
        3_000, 104, dict(spectrum="lines", line_energies_kev=(5.9,), line_weights=(1.0,), polarization_degree=1.0,
                         polarization_angle_deg=120.0, beam="gaussian", beam_sigma_mm=0.5),
        "5.9 keV, 100 % polarized at 120 deg (second angle, short run), same spot",
    ),
}
ZERO_SUPPRESSION_ELECTRONS = 150.0
#: the detector design of every run (written to the files' /run attribute 'design')
PRESET = "hedme-1atm-1cm"


def config_for(source_changes: dict, description: str):
    base = load_preset(PRESET)
    return dataclasses.replace(
        base,
        description=f"sample data: {description}",
        source=dataclasses.replace(base.source, **source_changes),
        readout=dataclasses.replace(base.readout, zero_suppression_electrons=ZERO_SUPPRESSION_ELECTRONS),
    )


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent)
    parser.add_argument("--scale", type=float, default=1.0, help="multiply every event count (tests use < 1)")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    total = 0
    for name, (n_events, seed, changes, description) in RUNS.items():
        config = config_for(changes, description)
        result = run(config, max(1, round(n_events * args.scale)), rng=seed, design=PRESET)
        path = result.write(args.out / name, overwrite=True, compression="gzip")
        size = path.stat().st_size
        total += size
        print(f"{name:34s} {len(result.batch):6d} events  {size / 1e6:5.2f} MB  seed {seed}  {description}")
    print(f"total {total / 1e6:.2f} MB")


if __name__ == "__main__":
    main()
