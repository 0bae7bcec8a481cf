#!/usr/bin/env python
"""Throughput and memory benchmark of the path users run (not a test; not in CI).

Builds simulated scans, then measures in one run, each step in its own process:

1. ``rfisieve run``: the whole workflow on one long scan, end to end, as users start it
   (Snakemake, the night's checks, the flag job, occupancy, the review page), timed from
   the command's start to its exit;
2. ``engine``: the engine alone (``flag_scan`` in a fresh process, imports included) with
   the shipped config/bands/L.yaml, as ``rfisieve run`` uses it: what the workflow adds is
   the ratio of the two; and the engine with the band schema's defaults (the bandpass
   model, persistence, compact and feed-pair tests off): what the new detection costs;
3. ``io``: the I/O floor: a plain h5py read of the data plus a write of a same-shaped
   uint8 mask, chunk by chunk;
4. ``sigmaclip``: astropy's ``sigma_clip`` written the way a user would: one call per
   product plane with ``axis=0``, after dividing by the channel medians, plus the same
   I/O (``--channel-loop`` adds the per-channel loop as a further line);
5. a night of many small scans (default 24 of 1024 dumps x 256 channels x 2 products)
   through ``rfisieve run`` against one scan holding the same samples;
6. memory: peak resident memory of the flag job (Snakemake's benchmark file) and of the
   engine alone on a scan 4x longer than a base scan (both longer than the engine's two
   windows of chunks: with the four products in two feed pairs a window holds two chunks
   of 4096 dumps, so the base scan has 32768 dumps, four windows).  A scan holds two
   windows with halos on both sides at once (one flagged, the next read ahead) only when
   it has four windows or more: at 12288 dumps the longer scan seemed to grow by 1.24 x, at
   20480 by 1.07-1.10 x (that base's first window lacks a halo and its third
   is half a window); from 32768 dumps on the peak is the same (1229-1244 MiB at 32768
   and at 81920 dumps, engine only, 2026-12-03).

Every time is wall-clock; ``--repeat`` (default 2) fresh runs of the long-scan steps
and the best is tabled (all are printed).

    .venv/bin/python bench/throughput.py            # 134 M-sample scan (as issue 11)
    .venv/bin/python bench/throughput.py --dumps 8192 --night-scans 8 --no-memory  # quick
"""

import argparse
import compileall
import csv
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
RFISIEVE = str(Path(sys.executable).parent / "rfisieve")


def build_scan(path, ntime, nchan, nprod, seed=1, accumulations=1024):
    """A scan of gamma-distributed dump powers (radiometer equation) with some RFI."""
    rng = np.random.default_rng(seed)
    freq = 1.30e9 + np.arange(nchan) * 200e3
    bandpass = (1.0 + 0.3 * np.sin(np.linspace(0, 6 * np.pi, nchan))).astype(np.float32)
    # the demo observatory's inputs <antenna>.<feed>: both feeds of each antenna, so the
    # feed pairs are flagged together as users' scans are (sumthreshold.combine_feeds)
    inputs = [f"pier{i // 2 + 1}.{'ab'[i % 2]}" for i in range(nprod)]
    products = [f"{a}-{a}" for a in inputs]
    rows = 1024
    with h5py.File(path, "w") as f:
        d = f.create_dataset("data", (ntime, nchan, nprod), dtype=np.float32,
                             chunks=(min(rows, ntime), nchan, nprod))
        for t0 in range(0, ntime, rows):
            t1 = min(ntime, t0 + rows)
            block = rng.standard_gamma(accumulations, size=(t1 - t0, nchan, nprod)).astype(np.float32)
            block /= accumulations
            block *= bandpass[None, :, None]
            # a few carriers and a broadband burst every 1000 dumps, ~5 noise rms
            block[:, 37::97, :] *= 1.0 + 5.0 / np.sqrt(accumulations)
            t = np.arange(t0, t1)
            block[(t % 1000) < 3] *= 1.0 + 8.0 / np.sqrt(accumulations)
            d[t0:t1] = block
        f["time"] = 1.8e9 + (seed * 1e5) + np.arange(ntime) * 0.5
        f["freq"] = freq
        f["products"] = np.array(products, dtype=object)
        f.attrs.update(band="L", integration_time=0.5, channel_width=200e3, accumulations=accumulations)


# -- child steps (each in a fresh process) --------------------------------------------
def step_engine(scan, out, workers, chunk_dumps, defaults=False):
    """``flag_scan`` with the shipped config/bands/L.yaml (what users run), or with the
    band schema's defaults (``defaults``: the bandpass model, persistence, compact and
    feed-pair tests off)."""
    from rfisieve.config.defaults import band_settings, run_settings
    from rfisieve.config.load import load_band
    from rfisieve.engine import flag_scan

    band = band_settings({"band": "L"}) if defaults else load_band(str(ROOT / "config" / "bands"), "L")[0]
    flag_scan(scan, out, band, run_settings({"workers": workers, "chunk_dumps": chunk_dumps}))


def step_io(scan, out, chunk_dumps):
    with h5py.File(scan, "r") as f, h5py.File(out, "w") as g:
        d = f["data"]
        m = g.create_dataset("flags", d.shape, dtype=np.uint8, chunks=(min(chunk_dumps, d.shape[0]),) + d.shape[1:],
                             compression="lzf")
        for t0 in range(0, d.shape[0], chunk_dumps):
            block = d[t0:t0 + chunk_dumps]
            m[t0:t0 + chunk_dumps] = (block < 0).astype(np.uint8)


def step_sigmaclip(scan, out, per_channel=False, sigma=4.0):
    """astropy's sigma_clip as a user would write it: per product plane, axis=0, on the
    data divided by each channel's median (``per_channel``: one call per channel)."""
    import warnings

    from astropy.stats import sigma_clip

    with h5py.File(scan, "r") as f, h5py.File(out, "w") as g:
        d = f["data"]
        m = g.create_dataset("flags", d.shape, dtype=np.uint8, compression="lzf")
        for p in range(d.shape[2]):
            plane = d[:, :, p]
            plane = plane / np.median(plane, axis=0)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                if per_channel:
                    mask = np.empty(plane.shape, np.uint8)
                    for c in range(plane.shape[1]):
                        mask[:, c] = np.ma.getmaskarray(sigma_clip(plane[:, c], sigma=sigma, maxiters=5))
                else:
                    clipped = sigma_clip(plane, sigma=sigma, maxiters=5, axis=0, masked=True)
                    mask = np.ma.getmaskarray(clipped).astype(np.uint8)
            m[:, :, p] = mask


def child(argv):
    step, scan, out = argv[0], argv[1], argv[2]
    workers, chunk_dumps = int(argv[3]), int(argv[4])
    t0 = time.perf_counter()
    if step in ("engine", "engine-defaults"):
        step_engine(scan, out, workers, chunk_dumps, defaults=step == "engine-defaults")
    elif step == "io":
        step_io(scan, out, chunk_dumps)
    elif step in ("sigmaclip", "sigmaclip-channels"):
        step_sigmaclip(scan, out, per_channel=step.endswith("channels"))
    elapsed = time.perf_counter() - t0
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"step": step, "seconds": elapsed, "peak_mib": peak_kib / 1024}))


def run_child(step, scan, out, workers, chunk_dumps):
    cmd = [sys.executable, __file__, "--child", step, str(scan), str(out), str(workers), str(chunk_dumps)]
    t0 = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    if res.returncode != 0:
        sys.exit(f"{step} failed:\n{res.stderr}")
    r = json.loads(res.stdout.strip().splitlines()[-1])
    r["seconds"] = wall  # the whole process, start-up and imports included
    return r


def rfisieve_run(inputs, outdir, workers, chunk_dumps, cores=2):
    """``rfisieve run`` from a fresh output directory: wall seconds, the flag jobs' largest
    peak RSS (MiB, from Snakemake's benchmark files) and the per-job seconds."""
    shutil.rmtree(outdir, ignore_errors=True)
    cmd = [RFISIEVE, "run", "--inputs", *inputs, "--outdir", str(outdir), "--cores", str(cores),
           "--set", f"workers={workers}", "--set", f"chunk_dumps={chunk_dumps}"]
    t0 = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    wall = time.perf_counter() - t0
    if res.returncode != 0:
        sys.exit(f"rfisieve run failed:\n{res.stderr[-3000:]}")
    jobs, peak = {}, 0.0
    for tsv in sorted(Path(outdir, "benchmarks").glob("*/*.tsv")):
        with open(tsv) as fh:
            row = next(csv.DictReader(fh, delimiter="\t"))
        jobs[f"{tsv.parent.name}/{tsv.stem}"] = float(row["s"])
        if tsv.parent.name == "flag":
            peak = max(peak, float(row["max_rss"]))
    return {"seconds": wall, "peak_mib": peak, "jobs": jobs}


def main():
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(sys.argv[2:])
        return
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--dumps", type=int, default=32768, help="dumps of the long scan (default 32768)")
    ap.add_argument("--channels", type=int, default=1024, help="channels (default 1024)")
    ap.add_argument("--products", type=int, default=4, help="auto products (default 4)")
    ap.add_argument("--workers", type=int, default=2, help="dask workers (default 2)")
    ap.add_argument("--chunk-dumps", type=int, default=4096, help="dumps per chunk (default 4096, as the run config)")
    ap.add_argument("--repeat", type=int, default=2, help="fresh runs of the long-scan steps; best tabled")
    ap.add_argument("--night-scans", type=int, default=24, help="small scans in the many-scan night (default 24)")
    ap.add_argument("--night-shape", default="1024x256x2", help="dumps x channels x products of each small scan")
    ap.add_argument("--memory-dumps", type=int, default=32768,
                    help="dumps of the memory check's base scan, four windows of chunks or more, so that "
                         "it holds two whole windows at once as longer scans do (its 4x longer twin is "
                         "also flagged)")
    ap.add_argument("--no-memory", action="store_true", help="skip the memory check")
    ap.add_argument("--no-sigmaclip", action="store_true", help="skip the astropy sigma_clip comparison")
    ap.add_argument("--channel-loop", action="store_true", help="also time sigma_clip per channel (slow)")
    ap.add_argument("--tmpdir", default=None, help="where to build scans (default: a temporary directory)")
    args = ap.parse_args()
    w, cd = args.workers, args.chunk_dumps
    load0 = os.getloadavg()[0]

    with tempfile.TemporaryDirectory(dir=args.tmpdir) as td:
        tmp = Path(td)
        scan = tmp / "long" / "bench_long.h5"
        scan.parent.mkdir()
        n = args.dumps * args.channels * args.products
        print(f"long scan: {args.dumps} dumps x {args.channels} channels x {args.products} products "
              f"= {n / 1e6:.1f} M samples", flush=True)
        build_scan(scan, args.dumps, args.channels, args.products)
        warm = tmp / "warm" / "warm.h5"
        warm.parent.mkdir()
        build_scan(warm, 600, 64, 2)
        rfisieve_run([str(warm)], tmp / "warm_out", w, cd)  # numba caches compiled, pages warm
        # the package's bytecode written, as `make install` does (PYTHONDONTWRITEBYTECODE)
        compileall.compile_dir(str(ROOT / "src"), quiet=1)
        rows = []

        def table(label, samples, runs):
            best = dict(min(runs, key=lambda x: x["seconds"]))
            best.update(step=label, samples=samples, peak_mib=max(x["peak_mib"] for x in runs))
            print(f"  {label:<22} " + " ".join(f"{x['seconds']:7.2f}" for x in runs) + " s", flush=True)
            rows.append(best)
            return best

        def rep(fn, k=args.repeat):
            return [fn() for _ in range(k)]

        runs = table("rfisieve run", n, rep(lambda: rfisieve_run([str(scan)], tmp / "out_long", w, cd)))
        table("engine only", n, rep(lambda: run_child("engine", scan, tmp / "engine.h5", w, cd)))
        table("engine, defaults", n, rep(lambda: run_child("engine-defaults", scan, tmp / "engine_d.h5", w, cd)))
        table("io floor", n, rep(lambda: run_child("io", scan, tmp / "io.h5", w, cd)))
        if not args.no_sigmaclip:
            table("sigma_clip per plane", n, [run_child("sigmaclip", scan, tmp / "sc.h5", w, cd)])
            if args.channel_loop:
                table("sigma_clip per channel", n, [run_child("sigmaclip-channels", scan, tmp / "scc.h5", w, cd)])

        # many small scans against the same samples in one scan
        nt, nc, npr = (int(x) for x in args.night_shape.split("x"))
        night = tmp / "night"
        night.mkdir()
        for i in range(args.night_scans):
            build_scan(night / f"small_{i:03d}.h5", nt, nc, npr, seed=10 + i)
        one = tmp / "one" / "one_scan.h5"
        one.parent.mkdir()
        build_scan(one, nt * args.night_scans, nc, npr, seed=9)
        ns = nt * nc * npr * args.night_scans
        many = table(f"night of {args.night_scans} scans", ns,
                     rep(lambda: rfisieve_run([str(night / "*.h5")], tmp / "out_night", w, cd)))
        single = table("same samples, 1 scan", ns, rep(lambda: rfisieve_run([str(one)], tmp / "out_one", w, cd)))

        mem = None
        if not args.no_memory:
            base = tmp / "mem" / "mem_base.h5"
            base.parent.mkdir()
            longer = tmp / "mem4" / "mem_4x.h5"
            longer.parent.mkdir()
            build_scan(base, args.memory_dumps, args.channels, args.products, seed=3)
            build_scan(longer, 4 * args.memory_dumps, args.channels, args.products, seed=4)
            mn = args.memory_dumps * args.channels * args.products
            mem = [table("memory: base scan", mn, [rfisieve_run([str(base)], tmp / "out_mem", w, cd)]),
                   table("memory: 4x longer", 4 * mn, [rfisieve_run([str(longer)], tmp / "out_mem4", w, cd)]),
                   table("memory: engine base", mn, [run_child("engine", base, tmp / "mb.h5", w, cd)]),
                   table("memory: engine 4x", 4 * mn, [run_child("engine", longer, tmp / "m4.h5", w, cd)])]

        by = {r["step"]: r for r in rows}
        floor = by["io floor"]["seconds"] / n
        print()
        print(f"{'step':<24}{'samples':>10}{'seconds':>9}{'Msamples/s':>12}{'peak MiB':>10}{'x I/O floor':>13}")
        for r in rows:
            print(f"{r['step']:<24}{r['samples'] / 1e6:>9.1f}M{r['seconds']:>9.2f}"
                  f"{r['samples'] / r['seconds'] / 1e6:>12.1f}{r['peak_mib']:>10.0f}"
                  f"{r['seconds'] / r['samples'] / floor:>13.2f}")
        rr, eng = by["rfisieve run"], by["engine only"]
        print()
        print(f"rfisieve run on the long scan: {n / rr['seconds'] / 1e6:.1f} M samples/s (target >= 15); "
              f"{rr['seconds'] / eng['seconds']:.2f} x engine only (target <= 1.3)")
        print(f"engine with the shipped config/bands/L.yaml: {n / eng['seconds'] / 1e6:.1f} M samples/s; with the "
              f"band defaults (bandpass, persistence, compact, feed pairs off): "
              f"{n / by['engine, defaults']['seconds'] / 1e6:.1f} M samples/s "
              f"({eng['seconds'] / by['engine, defaults']['seconds']:.2f} x the time)")
        if "sigma_clip per plane" in by:
            print(f"  against sigma_clip per plane: {rr['seconds'] / by['sigma_clip per plane']['seconds']:.2f} x "
                  "its time (target <= 1)")
        print("  jobs of the best run: " + ", ".join(f"{k} {v:.2f} s" for k, v in runs["jobs"].items()))
        print(f"night of {args.night_scans} scans: {many['seconds'] / single['seconds']:.2f} x the same samples "
              "in one scan (target <= 2)")
        for label, r in (("night", many), ("one scan", single)):
            print(f"  jobs ({label}): " + ", ".join(f"{k} {v:.2f} s" for k, v in r["jobs"].items()))
        if mem:
            print(f"memory, 4x longer scan: flag job {mem[1]['peak_mib']:.0f} vs {mem[0]['peak_mib']:.0f} MiB "
                  f"({mem[1]['peak_mib'] / mem[0]['peak_mib']:.3f} x); engine {mem[3]['peak_mib']:.0f} vs "
                  f"{mem[2]['peak_mib']:.0f} MiB ({mem[3]['peak_mib'] / mem[2]['peak_mib']:.3f} x) (target <= 1.10)")
        print(f"load average at the start {load0:.2f}, at the end {os.getloadavg()[0]:.2f} (the machine is shared)")
        print(f"workers={w} chunk_dumps={cd} cores={os.cpu_count()}; every time is the wall time of a fresh "
              "process (imports and start-up included); best of the runs printed per step")


if __name__ == "__main__":
    main()
