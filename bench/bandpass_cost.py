#!/usr/bin/env python
"""What the receiver-bandpass detection costs: the engine on one scan with the band
defaults (bandpass model, persistence test, compact boxes and feed pairs off), with the
shipped L-band config without the feed pairs combined, and as shipped (all on), timed in
one run (the scan's four products are both feeds of two antennas); prints both rates and their ratio, and the
peak memory of each pass (not a test; not in CI).

    .venv/bin/python bench/bandpass_cost.py                 # 12288 x 1024 x 4, 2 workers
    .venv/bin/python bench/bandpass_cost.py --dumps 49152   # memory flat in scan length?
"""

import argparse
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from throughput import build_scan  # noqa: E402  (the throughput bench's scan)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--dumps", type=int, default=12288)
    ap.add_argument("--channels", type=int, default=1024)
    ap.add_argument("--products", type=int, default=4)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--chunk-dumps", type=int, default=4096)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args(argv)

    from rfisieve.config.defaults import band_settings, run_settings
    from rfisieve.config.load import load_band
    from rfisieve.detect.sumthreshold import sumthreshold_halo
    from rfisieve.engine import flag_scan

    root = Path(__file__).resolve().parent.parent
    shipped = load_band(str(root / "config" / "bands"), "L")[0]
    unpaired = dict(shipped, sumthreshold=dict(shipped["sumthreshold"], combine_feeds=False))
    bands = {"defaults": band_settings({"band": "L"}), "L, no pairs": unpaired, "L.yaml": shipped}
    run = run_settings({"workers": args.workers, "chunk_dumps": args.chunk_dumps})
    n = args.dumps * args.channels * args.products
    with tempfile.TemporaryDirectory(prefix="rfisieve-bpcost-") as tmp:
        scan = Path(tmp) / "scan.h5"
        build_scan(scan, args.dumps, args.channels, args.products)
        flag_scan(scan, Path(tmp) / "warm.h5", bands["L.yaml"], run)      # compile, caches
        best = {}
        for _ in range(args.repeat):
            for name, band in bands.items():
                t0 = time.perf_counter()
                flag_scan(scan, Path(tmp) / f"{name}.h5", band, run)
                best[name] = min(best.get(name, 1e9), time.perf_counter() - t0)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"scan {args.dumps} x {args.channels} x {args.products} ({n / 1e6:.0f} M samples), "
          f"{args.workers} workers, chunks of {args.chunk_dumps} dumps; best of {args.repeat}")
    for name, band in bands.items():
        st = dict(band["sumthreshold"])
        print(f"  {name:11s} {best[name]:6.2f} s  {n / best[name] / 1e6:6.1f} M samples/s  "
              f"(SumThreshold halo {sumthreshold_halo(st)} dumps)")
    print(f"  ratio L.yaml / defaults: {best['L.yaml'] / best['defaults']:.2f} x the time "
          f"(feed pairs combined: {best['L.yaml'] / best['L, no pairs']:.2f} x); "
          f"peak RSS of this process {rss:.0f} MiB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
