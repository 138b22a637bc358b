"""Raw event file I/O: write size and read throughput per HDF5 filter, and peak memory while streaming.

Run:  python benchmarks/bench_io.py [--events 100000] [--roi-side 27] [--memory]

Prints, for each filter, the file size and the read throughput of the int16 signal (MB/s of decompressed data),
both for a bare h5py read and for ``open_raw(...).iter_batches`` (what the pipeline uses), as ratios against the
uncompressed file measured in the same run. With ``--memory`` it also streams files of 1e5 and 1e6 events in fresh
processes and prints their peak resident memory (it must not grow with the file size).

The events are synthetic: rectangular ROIs of Gaussian pedestal noise (sigma 6 ADC counts, common practice for
pedestal-subtracted CMOS pixels) with a few tens of pixels carrying a track of a few hundred counts. Their
compressibility, not their physics, is what matters here.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

from trackfit import EventBatch, HexGrid, RawEventWriter, open_raw
from trackfit.io import available_compressions


def synthetic_batch(n, rng, *, roi_side=27, grid=None, first_index=0):
    grid = grid or HexGrid()
    side = np.full(n, roi_side)
    c0 = rng.integers(0, grid.n_columns - roi_side, n)
    r0 = rng.integers(0, grid.n_rows - roi_side, n)
    roi = np.column_stack([c0, r0, side, side]).astype(np.int32)
    npix = side * side
    start = np.concatenate([[0], np.cumsum(npix)])
    signal = rng.normal(0, 6, start[-1])
    # a track: a random walk of ~40 pixels through the ROI centre, a few hundred counts each
    owner_pixels = rng.integers(0, roi_side * roi_side, (n, 40)) // 3 + roi_side * roi_side // 3
    signal[(start[:-1, None] + owner_pixels).ravel()] += rng.gamma(2.0, 120.0, n * 40)
    return EventBatch(roi=roi, start=start, signal=np.clip(np.rint(signal), -32768, 32767).astype(np.int16),
                      time_s=np.cumsum(rng.exponential(1e-3, n)), grid=grid,
                      index=np.arange(first_index, first_index + n))


def write_file(path, n, compression, roi_side, batch=50_000, seed=1):
    rng = np.random.default_rng(seed)
    with RawEventWriter(path, HexGrid(), compression=compression, overwrite=True) as writer:
        for a in range(0, n, batch):
            writer.append(synthetic_batch(min(batch, n - a), rng, roi_side=roi_side, first_index=a))


def _drop_page_cache_hint(path):
    # we cannot drop the OS page cache without privileges on every machine; read once to warm it so all filters
    # are compared from memory (the decompression cost is what differs between them)
    with open(path, "rb") as f:
        while f.read(1 << 24):
            pass


def time_bare_read(path, repeats=3):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        with h5py.File(path, "r") as f:
            ds = f["events/signal"]
            step = 1 << 22
            for a in range(0, ds.shape[0], step):
                ds[a:a + step]
        best = min(best, time.perf_counter() - t0)
    return best


def time_reader(path, prefetch, repeats=2):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        with open_raw(path) as reader:
            for _batch in reader.iter_batches(65_536, prefetch=prefetch, with_truth=False):
                pass
        best = min(best, time.perf_counter() - t0)
    return best


# VmHWM (peak resident set of this process image) rather than getrusage's ru_maxrss, which Linux carries over
# from the parent across fork + exec (a child of this big process would report the parent's peak).
MEMORY_CHILD = """
import sys
from trackfit import open_raw

def kib(key):
    return int([line for line in open("/proc/self/status") if line.startswith(key)][0].split()[1])

n = 0
with open_raw(sys.argv[1]) as reader:
    baseline = kib("VmHWM:")
    for batch in reader.iter_batches(65536, prefetch=sys.argv[2] == "prefetch"):
        n += len(batch)
print(n, kib("VmHWM:"), baseline)
"""


def memory_check(workdir, roi_side):
    print("\npeak resident memory (VmHWM) while streaming, fresh process each, batches of 65536 events:")
    rows = []
    for n in (100_000, 1_000_000, 3_000_000):
        path = Path(workdir) / f"mem_{n}.h5"
        write_file(path, n, "none", roi_side=roi_side)
        for mode in ("plain", "prefetch"):
            out = subprocess.run([sys.executable, "-c", MEMORY_CHILD, str(path), mode], capture_output=True,
                                 text=True, check=True).stdout.split()
            rows.append((n, mode, int(out[0]), int(out[1]) / 1024, path.stat().st_size / 1e6, int(out[2]) / 1024))
        path.unlink()
    for n, mode, read, rss_mb, size_mb, base_mb in rows:
        print(f"  {n:>9} events {mode:<8}  file {size_mb:8.1f} MB  read {read} events  peak RSS {rss_mb:7.1f} MB "
              f"(after import and open: {base_mb:.1f} MB; streaming added {rss_mb - base_mb:.1f} MB)")
    for mode in ("plain", "prefetch"):
        peaks = [r[3] for r in rows if r[1] == mode]
        print(f"  {mode}: peak RSS ratio 1e6/1e5 events {peaks[1] / peaks[0]:.3f}, 3e6/1e6 {peaks[2] / peaks[1]:.3f}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=100_000)
    parser.add_argument("--roi-side", type=int, default=27, help="ROI side in pixels (27 -> 729 pixels)")
    parser.add_argument("--memory", action="store_true", help="also measure peak RSS for 1e5 and 1e6 events")
    parser.add_argument("--memory-roi-side", type=int, default=12, help="ROI side of the memory-check files")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=os.environ.get("TRACKFIT_BENCH_DIR")) as workdir:
        results = {}
        for compression in available_compressions():
            path = Path(workdir) / f"{compression}.h5"
            t0 = time.perf_counter()
            write_file(path, args.events, compression, args.roi_side)
            t_write = time.perf_counter() - t0
            _drop_page_cache_hint(path)
            with h5py.File(path, "r") as f:
                mb = f["events/signal"].shape[0] * 2 / 1e6
            results[compression] = dict(size=path.stat().st_size / 1e6, write=t_write, bare=time_bare_read(path),
                                        reader=time_reader(path, False), prefetch=time_reader(path, True), mb=mb)
            path.unlink()
        base = results["none"]
        print(f"{args.events} events, {args.roi_side}x{args.roi_side} ROIs, {base['mb']:.0f} MB of int16 signal; "
              "throughput in MB/s of decompressed signal; ratios are against 'none' in this run")
        print(f"{'filter':<10} {'size MB':>8} {'size/none':>9} {'gen+write MB/s':>14} {'h5py MB/s':>10} "
              f"{'ratio':>6} {'reader MB/s':>11} {'ratio':>6} {'prefetch MB/s':>13}")
        for name, r in results.items():
            print(f"{name:<10} {r['size']:8.1f} {r['size'] / base['size']:9.2f} {r['mb'] / r['write']:14.0f} "
                  f"{r['mb'] / r['bare']:10.0f} {base['bare'] / r['bare']:6.2f} {r['mb'] / r['reader']:11.0f} "
                  f"{base['reader'] / r['reader']:6.2f} {r['mb'] / r['prefetch']:13.0f}")
    if args.memory:
        with tempfile.TemporaryDirectory(dir=os.environ.get("TRACKFIT_BENCH_DIR")) as workdir:
            memory_check(workdir, args.memory_roi_side)


if __name__ == "__main__":
    main()
