#!/usr/bin/env python
"""What gzip costs against LZF for the mask's /flags (not a test; not in CI).

Reads the /flags of real mask files (``<outdir>/flags/*.h5``, given on the command
line) into memory, then writes each one again, in one run, with the mask writer's chunk
shape and each compression in turn (LZF, gzip at levels 1 and 4, none), and reads it
back; prints the best of ``--repeat`` write and read times and the file size, and their
ratios to LZF.  gzip is what the mask writer uses (io/maskfile.py): every HDF5 library
reads it without a plug-in.

    .venv/bin/python bench/mask_compression.py demo/out/flags/*.h5 [--tile 8]
"""

import argparse
import os
import tempfile
import time

import h5py
import numpy as np

KINDS = (("lzf", {"compression": "lzf"}), ("gzip-1", {"compression": "gzip", "compression_opts": 1}),
         ("gzip-4", {"compression": "gzip", "compression_opts": 4}), ("none", {}))


def measure(flags, chunks, opts, path, repeat):
    writes, reads = [], []
    for _ in range(repeat):
        t = time.perf_counter()
        with h5py.File(path, "w") as f:
            f.create_dataset("flags", data=flags, chunks=chunks, shuffle=False, **opts)
        writes.append(time.perf_counter() - t)
        t = time.perf_counter()
        with h5py.File(path, "r") as f:
            back = f["flags"][()]
        reads.append(time.perf_counter() - t)
        assert np.array_equal(back, flags)
    return min(writes), min(reads), os.path.getsize(path)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("masks", nargs="+", help="mask files whose /flags are rewritten")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--tile", type=int, default=1, help="repeat each mask this many times along time (bigger files)")
    args = ap.parse_args()
    flags, chunks = [], []
    for p in args.masks:
        with h5py.File(p, "r") as f:
            flags.append(np.tile(f["flags"][()], (args.tile, 1, 1)))
            chunks.append(f["flags"].chunks)
    total = {k: np.zeros(3) for k, _ in KINDS}
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "m.h5")
        for fl, ch in zip(flags, chunks):
            for k, opts in KINDS:
                total[k] += measure(fl, ch, opts, path, args.repeat)
    nbytes = sum(f.nbytes for f in flags)
    print(f"{len(flags)} masks, {nbytes / 2**20:.1f} MiB of /flags in memory")
    print(f"{'compression':<12} {'write s':>8} {'read s':>8} {'MiB':>8} "
          f"{'write/lzf':>10} {'read/lzf':>9} {'size/lzf':>9}")
    ref = total["lzf"]
    for k, _ in KINDS:
        w, r, s = total[k]
        print(f"{k:<12} {w:8.3f} {r:8.3f} {s / 2**20:8.2f} {w / ref[0]:10.2f} {r / ref[1]:9.2f} {s / ref[2]:9.2f}")


if __name__ == "__main__":
    main()
