"""Make the validation and sensitivity tables of docs/simulator.md (simulated values only; the published values
beside them are written in the page).

Run from the repository root (a few minutes on one core):

    python docs/simulator_tables.py [--events 40000] [--seed 1] > tables.md

Sections: (1) validation of every preset: detection efficiency, modulation factor μ(E), escape-peak fraction;
(2) Fe-55 flat-field resolution of every preset; (3) escape of argon K fluorescence in the argon design against
the slab formula; (4) sensitivity of μ(E) and of the resolution to the design values that are least known;
(5) spread of the photoabsorption between the Elam and Chantler tables.
"""

from __future__ import annotations

import argparse
import dataclasses

import numpy as np
from scipy.special import expn

from trackfit import ReconConfig, reconstruct
from trackfit.analysis.spectrum import fit_fe55
from trackfit.design import simulate_performance, sweep_design
from trackfit.simulate import load_preset, run
from trackfit.simulate.fluorescence import FLUORESCENCE_FATES
from trackfit.simulate.gas import GasMixture

ENERGIES_KEV = {"hedme-1atm-1cm": [2.0, 2.7, 3.7, 5.9, 8.0], "dme-0.8atm-1cm": [2.0, 2.7, 3.7, 5.9, 8.0],
                "ardme-3atm-3cm": [2.7, 5.9, 8.0, 10.0, 20.0, 30.0]}
ESCAPED = (FLUORESCENCE_FATES.index("window"), FLUORESCENCE_FATES.index("multiplier"))
#: the published modulation factors the presets are validated against come from the two-stage analysis
TWO_STAGE = ReconConfig(emission_estimator="two-stage")


def fe55_resolution(config, n_events, seed):
    """FWHM/E of the Mn K-alpha line of a flat-field Fe-55 run (K-beta share fixed from the converted photons)."""
    fe55 = load_preset("hedme-1atm-1cm").source                   # the Fe-55 lines and flat field
    config = dataclasses.replace(config, source=fe55)
    result = run(config, n_events, rng=seed)
    table = reconstruct(result.batch, ReconConfig())
    good = np.asarray(table["status"]) == 0
    ph = np.asarray(table["pulse_height"], dtype=np.float64)[good]
    energy = np.asarray(result.truth["photon_energy_kev"])[good]
    kbeta = float((energy > 6.2).sum() / (energy < 6.2).sum())
    median = float(np.median(ph))
    fit = fit_fe55(ph, bins=80, range=(0.6 * median, 1.4 * median), kbeta_fraction=kbeta)
    return fit.fwhm_frac, fit.fwhm_frac_err


def argon_escape(n_events, seed):
    """Escaping fraction of Ar K fluorescence photons, simulated and from the slab formula ½E₂(μz) per face."""
    config = load_preset("ardme-3atm-3cm")
    result = run(config, n_events, rng=seed)
    t = result.truth
    emitted = (t["absorber_atomic_number"] == 18) & (t["fluorescence_energy_kev"] > 0)
    fate = t["fluorescence_fate"][emitted]
    simulated = float(np.isin(fate, ESCAPED).mean())
    mixture = GasMixture.from_config(config.gas)
    gap_cm = config.gas.gap_cm
    z_cm = t["conversion_z_mm"][emitted].astype(np.float64) / 10.0
    mu = mixture.absorption_per_cm(t["fluorescence_energy_kev"][emitted].astype(np.float64))
    slab = float(np.mean(0.5 * expn(2, mu * z_cm) + 0.5 * expn(2, mu * (gap_cm - z_cm))))
    fates = {name: float((fate == k).mean()) for k, name in enumerate(FLUORESCENCE_FATES) if k}
    return simulated, slab, int(emitted.sum()), fates


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=40_000, help="triggered events per point")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)
    n, seed = args.events, args.seed

    print("## 1. Validation: efficiency, modulation factor, escape peak\n")
    for name, energies in ENERGIES_KEV.items():
        print(f"### {name}\n")
        print(simulate_performance(load_preset(name), energies, n_events=n, seed=seed,
                                   recon_config=TWO_STAGE).to_markdown(), "\n")

    print("## 2. Fe-55 flat field (10 x 10 mm), FWHM of Mn K-alpha\n")
    print("| preset | FWHM |\n|---|---|")
    for name in ENERGIES_KEV:
        fwhm, err = fe55_resolution(load_preset(name), n, seed)
        print(f"| {name} | {100 * fwhm:.1f} % ± {100 * err:.1f} % |")

    print("\n## 3. Argon K fluorescence in ardme-3atm-3cm (source spectrum of the preset)\n")
    simulated, slab, emitted, fates = argon_escape(n, seed)
    print(f"escaping fraction {simulated:.3f} ± {np.sqrt(simulated * (1 - simulated) / emitted):.3f} "
          f"({emitted} photons); slab formula {slab:.3f}; fates " + ", ".join(f"{k} {v:.3f}" for k, v in fates.items()))

    print("\n## 4. Sensitivity (hedme-1atm-1cm, 100 % polarized spot)\n")
    hedme = load_preset("hedme-1atm-1cm")
    for key, values in [("drift.characteristic_energy_ratio", [1.0, 1.3, 1.6, 2.0, 2.5]),
                        ("drift.diffusion_um_per_sqrt_cm", [90.0]),
                        ("drift.field_v_per_cm", [1000.0, 3000.0]),
                        ("multiplier.transfer_spread_um", [10.0, 25.0]),
                        ("multiplier.polya_theta", [1.0]),
                        ("gas.fano_factor", [0.3])]:
        print(sweep_design(hedme, key, values, energies_kev=[2.7, 3.7, 5.9], n_events=n, seed=seed,
                           recon_config=TWO_STAGE).to_markdown(), "\n")
    print("| gain_map_rms | Fe-55 flat-field FWHM |\n|---|---|")
    for rms in (0.0, 0.05, 0.10):
        config = dataclasses.replace(hedme, multiplier=dataclasses.replace(hedme.multiplier, gain_map_rms=rms))
        fwhm, err = fe55_resolution(config, n, seed)
        print(f"| {rms:g} | {100 * fwhm:.1f} % ± {100 * err:.1f} % |")

    print("\n## 5. Gap absorption: Chantler / Elam - 1\n")
    energies = np.array([2.0, 2.7, 3.7, 5.9, 8.0, 10.0, 20.0, 30.0])
    print("| preset | " + " | ".join(f"{e:g} keV" for e in energies) + " |\n|---|" + "---|" * len(energies))
    for name in ENERGIES_KEV:
        gas = load_preset(name).gas
        elam = GasMixture.from_config(gas).absorption_probability(energies)
        chantler = GasMixture.from_config(dataclasses.replace(gas, cross_sections="chantler")
                                          ).absorption_probability(energies)
        print(f"| {name} | " + " | ".join(f"{100 * (c / e - 1):+.1f} %" for c, e in zip(chantler, elam, strict=True))
              + " |")


if __name__ == "__main__":
    main()
