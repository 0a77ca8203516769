#!/usr/bin/env python3
"""Corpus-build benchmark: build throughput against cold raw-read throughput, and peak memory.

Generates an archive of uncompressed 16-bit volumes (TIFF stacks, MRC and .npy; a ceramics lab's
filter scans in spirit: grains and pores with scanner noise), then, in one run:

1. evicts the data files from the page cache (``posix_fadvise(DONTNEED)``) and reads every
   file sequentially: the cold raw-read throughput;
2. drops the cache again and builds a corpus with ``warmstart corpus build`` in a subprocess:
   build throughput = source bytes / build wall time, bytes actually read from disk, and the peak
   resident memory of the build's whole process tree (sampled every 20 ms);
3. the same for one single 4 GB volume (memory target).

Three recipes are measured: ``default`` (the shipped defaults: every 8th slice), ``every-slice``
(slice stride 1: the build must read all the data, the honest worst case) and ``cubes`` (3-D
cubes of 48 voxels on a grid of 48: every voxel read; the 3-D memory target, RSS < 1.5 GB on the
4 GB volume).

Usage: python tools/bench_corpus.py [--dir DIR] [--gb 2.0] [--big-gb 4.0] [--workers 2] [--keep]
                                    [--recipes default,every-slice,cubes]
    (--gb 0 skips the archive: e.g. --gb 0 --recipes cubes measures the 3-D build alone)
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

SLICE = (1024, 1024)


def _texture(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Grains and pores: smoothed random field thresholded into two phases, as float in [0, 1]."""
    from scipy.ndimage import gaussian_filter

    field = gaussian_filter(rng.standard_normal(shape), 6)
    return (field > 0.0).astype(np.float32) * 0.6 + gaussian_filter(rng.standard_normal(shape), 2) * 2.0


def _slabs(n_slices: int, seed: int, slab: int = 32):
    rng = np.random.default_rng(seed)
    base = _texture(rng, SLICE)
    gain, offset = rng.uniform(15000, 30000), rng.uniform(2000, 8000)  # each "scanner" has its own
    for z0 in range(0, n_slices, slab):
        n = min(slab, n_slices - z0)
        out = np.empty((n,) + SLICE, np.uint16)
        for k in range(n):
            shifted = np.roll(base, (z0 + k) * 3, axis=1)
            noise = rng.integers(0, 1500, size=SLICE, dtype=np.uint16)
            out[k] = np.clip(offset + gain * shifted, 0, 60000).astype(np.uint16) + noise
        yield out


def make_volume(path: Path, n_slices: int, seed: int) -> None:
    import mrcfile
    import tifffile

    if path.suffix == ".tif":
        with tifffile.TiffWriter(path, bigtiff=True) as tw:
            for slab in _slabs(n_slices, seed):
                for sl in slab:
                    tw.write(sl, contiguous=True, resolution=(5000, 5000), resolutionunit="CENTIMETER")  # 2 µm
    elif path.suffix == ".npy":
        mm = np.lib.format.open_memmap(path, mode="w+", dtype=np.uint16, shape=(n_slices,) + SLICE)
        z = 0
        for slab in _slabs(n_slices, seed):
            mm[z:z + len(slab)] = slab
            z += len(slab)
        mm.flush()
        del mm
    else:
        with mrcfile.new_mmap(path, shape=(n_slices,) + SLICE, mrc_mode=6, overwrite=True) as m:
            z = 0
            for slab in _slabs(n_slices, seed):
                m.data[z:z + len(slab)] = slab
                z += len(slab)
            m.voxel_size = 20000.0  # 2 µm in Å


def drop_caches(files: list[Path]) -> str:
    """Evict the data files from the page cache (``posix_fadvise(DONTNEED)`` after ``sync``).

    Only the data goes cold: ``/proc/sys/vm/drop_caches`` would also evict Python and its
    libraries, so the timed build would pay for re-reading the virtual environment, which a
    workstation that runs builds all day keeps cached.
    """
    os.sync()
    for f in files:
        for p in ([f] if f.is_file() else [q for q in f.rglob("*") if q.is_file()]):
            fd = os.open(p, os.O_RDONLY)
            try:
                os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
            finally:
                os.close(fd)
    return "posix_fadvise DONTNEED"


def disk_read_bytes() -> int:
    """Bytes read from all block devices so far (/proc/diskstats, 512-byte sectors)."""
    total = 0
    with open("/proc/diskstats") as fh:
        for line in fh:
            f = line.split()
            name = f[2]
            if name.startswith(("loop", "ram", "dm-")) or name[-1].isdigit() and not name.startswith("nvme"):
                continue  # whole disks only (vda, sda, nvme0n1)
            total += int(f[5]) * 512
    return total


def raw_read(files: list[Path]) -> tuple[float, int]:
    buf = bytearray(16 * 2**20)
    view = memoryview(buf)
    total = 0
    t0 = time.perf_counter()
    for f in files:
        with open(f, "rb", buffering=0) as fh:
            while n := fh.readinto(view):
                total += n
    return time.perf_counter() - t0, total


def _tree_rss(pid: int) -> int:
    import psutil

    try:
        p = psutil.Process(pid)
        procs = [p] + p.children(recursive=True)
    except psutil.NoSuchProcess:
        return 0
    total = 0
    for q in procs:
        try:
            total += q.memory_info().rss
        except psutil.NoSuchProcess:
            pass
    return total


def timed_build(archive: Path, out: Path, extra: list[str]) -> dict[str, float]:
    shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-m", "warmstart", "-q", "corpus", "build", str(archive), "-o", str(out), "--no-report", "--json", *extra]
    before = disk_read_bytes()
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True)
    peak = [0]

    def sample() -> None:
        while proc.poll() is None:
            peak[0] = max(peak[0], _tree_rss(proc.pid))
            time.sleep(0.02)

    th = threading.Thread(target=sample, daemon=True)
    th.start()
    stdout, _ = proc.communicate()
    wall = time.perf_counter() - t0
    th.join()
    if proc.returncode not in (0,):
        raise SystemExit(f"build failed ({proc.returncode}): {stdout}")
    res = json.loads(stdout)
    return {"seconds": wall, "peak_rss": peak[0], "disk_read": disk_read_bytes() - before, "patches": res["n_patches"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", type=Path, default=None, help="where to generate the archive (default: a temp dir)")
    ap.add_argument("--gb", type=float, default=2.0, help="archive size (GB of 16-bit voxels)")
    ap.add_argument("--big-gb", type=float, default=4.0, help="size of the single-volume memory test (0 skips)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--keep", action="store_true", help="keep the generated data")
    ap.add_argument("--recipes", default="default,every-slice,cubes", help="which builds to time (comma list)")
    args = ap.parse_args()
    root = args.dir or Path(tempfile.mkdtemp(prefix="warmstart-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    archive, big = root / "archive", root / "single"
    per_slice = SLICE[0] * SLICE[1] * 2
    n_vol = 4
    slices = int(args.gb * 1e9 / per_slice / n_vol) + 1
    t0 = time.perf_counter()
    if args.gb > 0 and not archive.exists():
        archive.mkdir()
        for i, suffix in enumerate([".tif", ".mrc", ".npy", ".tif"]):
            make_volume(archive / f"filter_{i}{suffix}", slices, seed=i)
    if args.big_gb > 0 and not big.exists():
        big.mkdir()
        make_volume(big / "filter_big.npy", int(args.big_gb * 1e9 / per_slice) + 1, seed=99)
    print(f"generated data in {time.perf_counter() - t0:.0f} s under {root}")
    recipes = {"default": [], "every-slice": ["--set", "sampling.slice_stride=1", "--set", "sampling.max_per_source=1000000",
                                              "--set", "sampling.stride=256"],
               "cubes": ["--set", "sampling.spatial_dims=3", "--set", "sampling.patch_size=48", "--set", "sampling.stride=48",
                         "--set", "sampling.assume_cubic_voxels=true", "--set", "sampling.max_per_source=1000000",
                         "--set", "store.chunk_patches=32"]}  # 7 MB chunks of cubes, as for 2-D patches
    recipes = {k: v for k, v in recipes.items() if k in args.recipes.split(",")}
    rows = []
    for label, data in ([("archive", archive)] if args.gb > 0 else []) + ([("single volume", big)] if args.big_gb > 0 else []):
        files = sorted(p for p in data.iterdir())
        size = sum(p.stat().st_size for p in files)
        print(f"[{label}] {size / 1e9:.2f} GB in {len(files)} files")
        for name, extra in recipes.items():
            # The disk's cold speed drifts between runs here (0.7 to 1.9 GB/s seen), so each build is
            # paired with a cold raw read taken just before it.
            how = drop_caches(files)
            rt, rbytes = raw_read(files)
            raw_speed = rbytes / rt / 1e6
            drop_caches(files)
            r = timed_build(data, root / "corpus.zarr", ["--workers", str(args.workers), *extra])
            speed = size / r["seconds"] / 1e6
            row = {"data": label, "recipe": name, "source_GB": round(size / 1e9, 2), "raw_read_MBps": round(raw_speed),
                   "build_MBps": round(speed), "ratio": round(speed / raw_speed, 2), "build_s": round(r["seconds"], 1),
                   "disk_read_GB": round(r["disk_read"] / 1e9, 2), "peak_rss_GB": round(r["peak_rss"] / 1e9, 2),
                   "patches": r["patches"]}
            rows.append(row)
            print(f"  {name:12s} cold raw read ({how}) {raw_speed:5.0f} MB/s; build {speed:6.0f} MB/s of source voxels "
                  f"= {speed / raw_speed:.2f} x; {r['seconds']:.1f} s, read {r['disk_read'] / 1e9:.2f} GB from disk, "
                  f"peak RSS {r['peak_rss'] / 1e9:.2f} GB (process tree), {r['patches']} patches")
    print(json.dumps(rows, indent=1))
    shutil.rmtree(root / "corpus.zarr", ignore_errors=True)
    if not args.keep and args.dir is None:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
