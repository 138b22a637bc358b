"""Reconstruction speed and memory, as ratios against baselines measured in the same run.

Run:  python benchmarks/bench_reconstruct.py [--events 200000] [--sim-events 100000] [--sim-energies 3 6]
                                             [--repeats 5] [--parts] [--no-memory] [--workdir DIR]

Prints side by side, all with the two-stage analysis (``emission_estimator = "two-stage"``; ``bench_estimators.py``
times the other estimates against it):

1. kernel: events/s of the numba kernel on one core (and all threads) over toy ROIs of 28 x 27 = 756 pixels,
   against a per-event numpy + ``scipy.ndimage`` implementation (``trackfit.recon._reference``: vectorised within
   each event, what a user would write by hand). Targets: >= 250k events/s per core and >= 35x the per-event
   implementation.
2. whole files, for the toy file and simulator files (``trackfit simulate --preset hedme-1atm-1cm --energy-kev E``,
   uncompressed, about 300 ROI pixels per event):
   a. the breakdown of the work around the kernel, each stage alone on one core: read (h5py, the signal viewed
      through memory maps of the file, + validation of the events; the pages are touched by the next stages),
      checksum (the CRC-32 content fingerprint, by zlib-ng when ``trackfit[fast]`` is installed, else by zlib;
      the header names which), kernel, columns (assembly of the result columns), write
      (the table's columns, with its creation and closing) and truth copy (the simulation truth, copied by HDF5),
      in ms per 1e5 events and as a share of the kernel;
   b. ``reconstruct_file`` against the kernel alone on the same events held in memory, with 1 and all kernel
      threads, runs interleaved, best of ``--repeats`` (and the median, lowest and highest ratio of the rounds,
      each round timing the kernel and the files within seconds of each other). Targets: >= 0.9x the kernel's
      events/s with 1 thread, >= 0.8x with all threads. For a simulator file also without the copy of its truth
      (``--skip-truth``, as for a lab file, which has none). Then the fixed cost of a file: ``reconstruct_file`` on
      a file of its first 100 events (opening and checking the input, creating and closing the table).
   With ``--parts``: the same file split into event ranges over a spawn process pool (``reconstruct_in_parts``),
   which pays about 1.5 s to start each worker process.
3. memory: peak resident memory of ``reconstruct_file`` in a fresh process for files of 1e5 and 1e6 events (the
   larger file repeats the events of the smaller one ten times). Target: independent of the file size.

The toy tracks (``trackfit.recon._synthetic``: a 0.6 mm segment with charge rising towards its end, diffused by
60 um, about 60 pixels above the default threshold of 10 ADC counts, Gaussian pixel noise of 2 ADC counts) exercise
large ROIs; the simulator files are the realistic input. The machine may be shared with other work: run it several
times, compare, and read the ratios rather than the absolute numbers.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from trackfit import EventBatch, RawEventWriter, ReconConfig, open_raw, reconstruct_file
from trackfit.io.fingerprint import CRC32_BACKEND, RawFingerprint
from trackfit.io.table import TableWriter
from trackfit.recon._reference import reconstruct_batch_reference
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.pipeline import DEFAULT_BATCH_SIZE, _columns, _Prepared, batch_bounds, truth_columns

ROI_SHAPE = (28, 27)
TRACK = dict(length_mm=0.6, diffusion_mm=0.06, adc_per_electron=6.0, noise_adc=2.0, roi_shape=ROI_SHAPE)


def make_file(path, n, seed=1, chunk=20_000, repeat=1):
    """Write ``n`` toy events (``repeat`` copies of them when ``repeat > 1``)."""
    rng = np.random.default_rng(seed)
    blocks = [toy_tracks(min(chunk, n - a), rng, **TRACK) for a in range(0, n, chunk)]
    with RawEventWriter(path, blocks[0].grid, overwrite=True) as writer:
        for _ in range(repeat):
            for block in blocks:
                writer.append(EventBatch(roi=block.roi, start=block.start, signal=block.signal,
                                         time_s=block.time_s, grid=block.grid, validate=False))
    return path


def best_of(fn, repeats):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def bench_kernel(batch, config, repeats=5):
    from concurrent.futures import ThreadPoolExecutor

    prepared = _Prepared(config, batch.grid)
    prepared.run(batch)  # compile (or load from cache) outside the timing
    one = best_of(lambda: prepared.run(batch), repeats)
    with ThreadPoolExecutor(2) as pool:
        two = best_of(lambda: prepared.run(batch, 2, pool), repeats)
    n_reference = min(2000, len(batch))
    sub = batch.select(np.arange(n_reference))
    reference = best_of(lambda: reconstruct_batch_reference(sub, config), 1) / n_reference * len(batch)
    return one, two, reference


def make_simulator_file(path, n, energy_kev, seed=7):
    """``trackfit simulate --preset hedme-1atm-1cm --energy-kev E -n N`` (uncompressed), unless it exists."""
    if Path(path).exists():
        return Path(path)
    from trackfit.simulate import load_preset, run

    design = "hedme-1atm-1cm"
    config = load_preset(design).with_monochromatic(energy_kev=energy_kev)
    return run(config, n, rng=seed, design=design).write(path)


def breakdown(raw, config, batch_size, repeats=3):
    """Seconds of each stage around the kernel, alone on one core (best of ``repeats``)."""
    def best(fn):
        times, value = [], None
        for _ in range(repeats):
            t = time.perf_counter()
            value = fn()
            times.append(time.perf_counter() - t)
        return min(times), value

    out = {}
    with open_raw(raw) as reader:
        n = len(reader)
        bounds = batch_bounds(0, n, batch_size)
        prepared = _Prepared(config, reader.grid, config.energy_scale(reader.run_info)[0])

        def read():  # the signal viewed through memory maps, as reconstruct_file reads it
            return [reader.read_batch(a, b, with_truth=False, mapped=True) for a, b in bounds]

        out["read"], batches = best(read)
        batches = [reader.read_batch(a, b, with_truth=False) for a, b in bounds]  # own memory, kept

        def checksum():
            fingerprint = RawFingerprint()
            for batch in batches:
                fingerprint.update(batch)

        out["checksum"], _ = best(checksum)
        prepared.run(batches[0])  # compiled or loaded from the cache outside the timing
        out["kernel"], results = best(lambda: [prepared.run(batch) for batch in batches])
        out["columns"], columns = best(lambda: [_columns(batch, *r) for batch, r in zip(batches, results,
                                                                                       strict=True)])
        copies = truth_columns(reader)

        def write(copy):
            with TableWriter(raw.parent / "bench_breakdown.h5", overwrite=True, expected_rows=n,
                             exact_rows=True) as writer:
                for c in columns:
                    writer.append(c)
                if copy:
                    for name, dataset in copies:
                        writer.copy_column(name, dataset)

        out["write"], _ = best(lambda: write(False))
        with_truth, _ = best(lambda: write(True))
        out["truth copy"] = max(with_truth - out["write"], 0.0) if copies else 0.0
    (raw.parent / "bench_breakdown.h5").unlink(missing_ok=True)
    return n, out, len(copies)


def small_file(raw, n=100):
    """A raw file of the first ``n`` events of ``raw`` (with their truth and run attributes), for the fixed cost."""
    path = raw.parent / f"{raw.stem}_first{n}.h5"
    with open_raw(raw) as reader, RawEventWriter(path, reader.grid, run_info=reader.run_info,
                                                 overwrite=True) as writer:
        writer.append(reader.read_batch(0, min(n, len(reader))))
    return path


def whole_file(raw, config, batch_size, repeats, threads_all, parts=False):
    """Best seconds of the kernel alone and of reconstruct_file (1 and all threads, without the truth copy too when
    the file has a truth, and on a file of the first 100 events: the fixed cost of a file), interleaved."""
    from concurrent.futures import ThreadPoolExecutor

    small = small_file(raw)
    with open_raw(raw) as reader:
        has_truth = bool(reader.truth_names)
        batch = reader.read_all(with_truth=False)
        prepared = _Prepared(config, reader.grid, config.energy_scale(reader.run_info)[0])
    prepared.run(batch.select(np.arange(min(100, len(batch)))))
    pool = ThreadPoolExecutor(threads_all)
    out = raw.parent / "bench_out.h5"
    best, cpu, rounds, cpu_rounds = {}, {}, {}, {}

    def timed(key, fn):
        # the previous output is deleted outside the timing: replacing a file of tens of MB frees its pages in the
        # kernel, which costs up to 20 ms and is not part of the reconstruction
        out.unlink(missing_ok=True)
        c, t = time.process_time(), time.perf_counter()
        fn()
        wall, used = time.perf_counter() - t, time.process_time() - c
        rounds.setdefault(key, []).append(wall)
        cpu_rounds.setdefault(key, []).append(used)
        if wall < best.get(key, np.inf):
            best[key], cpu[key] = wall, used

    for _ in range(repeats):
        timed("kernel 1", lambda: prepared.run(batch))
        timed("kernel all", lambda: prepared.run(batch, threads_all, pool))
        timed("file 1", lambda: reconstruct_file(raw, out, config, batch_size=batch_size, progress=False,
                                                  overwrite=True, threads=1))
        timed("file all", lambda: reconstruct_file(raw, out, config, batch_size=batch_size, progress=False,
                                                    overwrite=True, threads=threads_all))
        if has_truth:  # as a lab file (no truth) or --skip-truth
            for label, threads in (("1", 1), ("all", threads_all)):
                timed(f"file {label} skip truth",
                      lambda threads=threads: reconstruct_file(raw, out, config, batch_size=batch_size, progress=False,
                                                               overwrite=True, threads=threads, with_truth=False))
        timed("100 events", lambda: reconstruct_file(small, out, config, batch_size=batch_size, progress=False,
                                                      overwrite=True, threads=1))
    if parts:
        from trackfit.recon.parts import reconstruct_in_parts

        for _ in range(2):
            timed("parts", lambda: reconstruct_in_parts(raw, out, config, workers=threads_all,
                                                        batch_size=batch_size, overwrite=True))
    pool.shutdown()
    out.unlink(missing_ok=True)
    small.unlink(missing_ok=True)
    return len(batch), best, cpu, rounds, cpu_rounds


def round_ratios(rounds, kernel_key, file_key) -> np.ndarray:
    """kernel / file time of each round (both measured within seconds of each other): steadier than the ratio of
    the best times when the machine's own speed drifts during the run."""
    return np.asarray(rounds[kernel_key]) / np.asarray(rounds[file_key])


def report_file(label, raw, config, args, threads_all):
    n, stages, n_truth = breakdown(raw, config, args.batch_size)
    kernel = stages["kernel"]
    with open_raw(raw) as reader:
        pixels = reader.n_pixels_total / max(len(reader), 1)
    print(f"\n2. {label}: {n} events, {pixels:.0f} ROI pixels per event, {raw.stat().st_size / 1e6:.0f} MB"
          + (f", {n_truth} truth columns" if n_truth else ""))
    print("   a. each stage alone on one core     ms per 1e5 events   share of the kernel")
    for key in ("read", "checksum", "kernel", "columns", "write", "truth copy"):
        print(f"      {key:<33}{stages[key] / n * 1e8:>10.1f}{stages[key] / kernel:>18.1%}")
    around = sum(v for k, v in stages.items() if k != "kernel")
    print(f"      {'all but the kernel':<33}{around / n * 1e8:>10.1f}{around / kernel:>18.1%}")
    n, best, cpu, rounds, cpu_rounds = whole_file(raw, config, args.batch_size, args.repeats, threads_all,
                                                  parts=args.parts)
    print(f"   b. events/s (best of {args.repeats} interleaved runs)   1 thread      {threads_all} threads")
    print(f"      kernel alone, events in memory   {n / best['kernel 1']:>12,.0f}  {n / best['kernel all']:>12,.0f}")
    print(f"      reconstruct_file                 {n / best['file 1']:>12,.0f}  {n / best['file all']:>12,.0f}")
    one, every = best["kernel 1"] / best["file 1"], best["kernel all"] / best["file all"]
    print(f"      ratio file / kernel              {one:>12.2f}  {every:>12.2f}   (targets >= 0.90 and >= 0.80: "
          f"{'met' if one >= 0.9 else 'NOT met'}, {'met' if every >= 0.8 else 'NOT met'})")
    spread = {}
    for label, suffix in (("", ""), (" skip truth", ", --skip-truth")):
        if f"file 1{label}" not in rounds:
            continue
        one_r = round_ratios(rounds, "kernel 1", f"file 1{label}")
        all_r = round_ratios(rounds, "kernel all", f"file all{label}")
        spread[label.strip() or "default"] = (one_r.tolist(), all_r.tolist())
        print(f"      ratio of each round{suffix}: median {np.median(one_r):.2f} ({one_r.min():.2f}-{one_r.max():.2f}) "
              f"/ {np.median(all_r):.2f} ({all_r.min():.2f}-{all_r.max():.2f})")
    if "file 1 skip truth" in best:
        skip_one = best["kernel 1"] / best["file 1 skip truth"]
        skip_every = best["kernel all"] / best["file all skip truth"]
        print(f"      without the truth copy (--skip-truth){n / best['file 1 skip truth']:>9,.0f}  "
              f"{n / best['file all skip truth']:>12,.0f}")
        print(f"      ratio file / kernel                {skip_one:>10.2f}  {skip_every:>12.2f}")
    print(f"      CPU seconds: file {cpu['file 1']:.3f} / {cpu['file all']:.3f} against kernel {cpu['kernel 1']:.3f} / "
          f"{cpu['kernel all']:.3f}; load average now {os.getloadavg()[0]:.2f}")
    # all cores busy from the first to the last instant is the best a whole-file run can do: its CPU time over the
    # cores is then its wall time, so the kernel's wall time times the cores over the file's CPU time bounds the ratio
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    bound = np.asarray(rounds["kernel all"]) * cores / np.asarray(cpu_rounds["file all"])
    print(f"      bound from the CPU time on {cores} cores: the file takes "
          f"{np.median(cpu_rounds['file all']):.3f} s of CPU, so its {threads_all}-thread ratio cannot pass "
          f"{np.median(bound):.2f} (median of the rounds)")
    print(f"      fixed cost of a file (reconstruct_file on its first 100 events, 1 thread): "
          f"{best['100 events'] * 1e3:.1f} ms, {best['100 events'] / best['kernel 1']:.1%} of the kernel's time for "
          f"the {n} events")
    if "parts" in best:
        print(f"      reconstruct_in_parts, {threads_all} processes: {n / best['parts']:,.0f} events/s "
              f"({best['kernel all'] / best['parts']:.2f}x the kernel; each process starts in about 1.5 s)")
    figures = {"events": n, "stages_s": stages, "best_s": best, "ratio_1": one, "ratio_all": every,
               "fixed_s": best["100 events"], "round_ratios": spread, "cpu_bound_all": float(np.median(bound))}
    if "file 1 skip truth" in best:
        figures.update(ratio_1_skip_truth=skip_one, ratio_all_skip_truth=skip_every)
    return figures


# VmHWM (peak resident set of this process image), not getrusage's ru_maxrss: Linux carries ru_maxrss over from
# the parent across fork + exec, so a child of a big benchmark process would report the parent's peak.
_MEMORY_CHILD = """
import json, sys
from trackfit import ReconConfig, reconstruct_file

def status(key):
    return int([line for line in open("/proc/self/status") if line.startswith(key)][0].split()[1]) / 1024

done, samples = [0], []
def progress(n):
    done[0] += n
    samples.append((done[0], status("VmRSS:")))

reconstruct_file(sys.argv[1], sys.argv[2], ReconConfig(emission_estimator="two-stage"), progress=progress,
                 overwrite=True, batch_size=int(sys.argv[3]))
first = max(rss for n, rss in samples if n <= 100_000)
rest = max((rss for n, rss in samples if n > 100_000), default=float("nan"))
print(json.dumps({"peak_rss_mb": status("VmHWM:"), "first_1e5_mb": first, "after_1e5_mb": rest}))
"""


def peak_rss_mb(raw_path, out_path, batch_size):
    """VmHWM of a fresh process running reconstruct_file, and VmRSS sampled after each batch (largest over the
    first 1e5 events and over the rest)."""
    result = subprocess.run([sys.executable, "-c", _MEMORY_CHILD, str(raw_path), str(out_path), str(batch_size)],
                            check=True, capture_output=True, text=True)
    return json.loads(result.stdout.strip().splitlines()[-1])


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--events", type=int, default=200_000, help="events of the toy file (>= 200000)")
    parser.add_argument("--sim-events", type=int, default=100_000, help="events of each simulator file")
    parser.add_argument("--sim-energies", type=float, nargs="*", default=[3.0, 6.0],
                        help="photon energies (keV) of the simulator files (none: toy file only)")
    parser.add_argument("--batch-size", type=int, default=DEFAULT_BATCH_SIZE)
    parser.add_argument("--repeats", type=int, default=5, help="interleaved repetitions of the whole-file timings")
    parser.add_argument("--parts", action="store_true", help="also time reconstruct_in_parts (process pool)")
    parser.add_argument("--no-memory", action="store_true", help="skip the 1e5 / 1e6 event memory check")
    parser.add_argument("--no-reference", action="store_true", help="skip the numpy + scipy kernel baseline")
    parser.add_argument("--json", default=None, help="write the figures to this JSON file")
    parser.add_argument("--workdir", default=None,
                        help="folder for the files (default: a temporary folder; simulator files found there are "
                        "reused)")
    args = parser.parse_args(argv)
    # the two-stage analysis, which the numpy baseline implements; bench_estimators.py measures what the default
    # adaptive estimate and the skeleton estimate add to it
    config = ReconConfig(emission_estimator="two-stage")
    threads_all = os.cpu_count() or 1
    figures: dict = {"crc32_backend": CRC32_BACKEND}
    with tempfile.TemporaryDirectory(dir=args.workdir) as tmp:
        tmp = Path(tmp)
        keep = Path(args.workdir) if args.workdir else tmp
        t = time.perf_counter()
        raw = make_file(tmp / "bench.h5", args.events)
        print(f"made {args.events} toy events ({ROI_SHAPE[0]} x {ROI_SHAPE[1]} pixel ROIs) in "
              f"{time.perf_counter() - t:.1f} s; file {raw.stat().st_size / 1e6:.0f} MB; "
              f"{threads_all} CPUs; load average {os.getloadavg()[0]:.2f}; CRC-32 by {CRC32_BACKEND}")
        sims = {}
        for energy in args.sim_energies:
            t = time.perf_counter()
            sims[energy] = make_simulator_file(keep / f"sim_hedme_{energy:g}kev_{args.sim_events}.h5",
                                               args.sim_events, energy)
            print(f"simulator file at {energy:g} keV ready in {time.perf_counter() - t:.1f} s")

        # 1. kernel against the per-event numpy + scipy implementation
        with open_raw(raw) as reader:
            batch = reader.read_all(with_truth=False)
        n = len(batch)
        n_pix = int(batch.start[-1])
        out_f, out_i = _Prepared(config, batch.grid).run(batch)
        columns = _columns(batch, out_f, out_i)
        print(f"\nhit pixels per event {columns['n_pixels'].mean():.1f}, status == 0 for "
              f"{np.mean(columns['status'] == 0):.1%}")
        if not args.no_reference:
            one, two, reference = bench_kernel(batch, config)
            print("\n1. kernel                         events/s     ns/ROI pixel   ratio")
            print(f"   numpy + scipy.ndimage, 1 core  {n / reference:>11,.0f}   {reference / n_pix * 1e9:>10.1f}   1.0")
            print(f"   numba kernel, 1 thread         {n / one:>11,.0f}   {one / n_pix * 1e9:>10.2f}   "
                  f"{reference / one:,.0f}x   (target >= 250,000/s and >= 35x)")
            print(f"   numba kernel, 2 threads        {n / two:>11,.0f}   {two / n_pix * 1e9:>10.2f}   "
                  f"{reference / two:,.0f}x")
            figures["kernel"] = {"events_per_s_1": n / one, "events_per_s_2": n / two,
                                 "reference_events_per_s": n / reference}
        del batch, columns, out_f, out_i

        # 2. whole files
        figures["toy"] = report_file("toy file", raw, config, args, threads_all)
        for energy, path in sims.items():
            figures[f"sim_{energy:g}kev"] = report_file(f"simulator file, {energy:g} keV", path, config, args,
                                                        threads_all)

        # 3. memory
        if not args.no_memory:
            small = make_file(tmp / "mem_1e5.h5", 100_000, seed=2)
            large = make_file(tmp / "mem_1e6.h5", 100_000, seed=2, repeat=10)
            print("\n3. peak RSS of reconstruct_file in a fresh process (VmHWM; about 110 MB of it is the "
                  "interpreter with numpy, h5py and numba)")
            for batch_size in (DEFAULT_BATCH_SIZE, 8192):
                small_rss = peak_rss_mb(small, tmp / "mem_out_small.h5", batch_size)
                large_rss = peak_rss_mb(large, tmp / "mem_out_large.h5", batch_size)
                peak_small, peak_large = small_rss["peak_rss_mb"], large_rss["peak_rss_mb"]
                print(f"   batch size {batch_size:>6}: 1e5 events ({small.stat().st_size / 1e6:.0f} MB) "
                      f"{peak_small:.0f} MB, 1e6 events ({large.stat().st_size / 1e6:.0f} MB) {peak_large:.0f} MB, "
                      f"ratio {peak_large / peak_small:.2f}; 1e6 run sampled after each batch: largest RSS "
                      f"{large_rss['first_1e5_mb']:.0f} MB over the first 1e5 events, "
                      f"{large_rss['after_1e5_mb']:.0f} MB over the other 9e5")
                figures[f"memory_{batch_size}"] = {"small_mb": peak_small, "large_mb": peak_large}
            print("   (with the default batch size a 1e5-event file is only 4 batches and never fills the read-ahead "
                  "of the pipeline; at 8192 both files reach the steady state)")
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=1, default=float) + "\n")


if __name__ == "__main__":
    main()
