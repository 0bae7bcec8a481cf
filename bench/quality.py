#!/usr/bin/env python
"""Flagging-quality benchmark against simulated truth (not a test; not in CI).

For each scene (a simulated scan with its truth file, rfisieve.sim.scans):

1. rfisieve with the default band settings (``rfisieve.engine.flag_scan``), scored
   with ``rfisieve.evaluate.score`` (recall per INR bin and per kind, false alarms on clean
   samples);
2. the fair comparison: astropy's ``sigma_clip`` applied per channel along time to each
   product's plane (median centre, standard-deviation scale, 5 iterations: what a user
   would otherwise reach for), its ``sigma`` chosen by bisection so that its false-alarm
   rate on the clean samples equals rfisieve's on that scene; recall is then compared
   at equal false alarms.

Samples that are input-, invalid- or static-flagged, and dropped dumps, are left out of
both methods' scores (they are not a flagging decision; see rfisieve.evaluate.score).

    .venv/bin/python bench/quality.py                      # all scenes, ~ a few minutes
    .venv/bin/python bench/quality.py --scenes noise carriers
    .venv/bin/python bench/quality.py --set sumthreshold.chi1=5.5 --set growth.eta=0.3
    .venv/bin/python bench/quality.py --field              # field scenes, tuning seeds
    .venv/bin/python bench/quality.py --field --heldout    # field scenes, held-out seeds
    .venv/bin/python bench/quality.py --field --standing-wave 0.01,40   # plus a 1 % standing wave (40 m path)
    .venv/bin/python bench/quality.py --field --second-strength 0       # every emitter in one polarization

Field scenes (rfisieve.sim.field; ``--field``): 4096 dumps x 1024 channels of 62.5 kHz
around the 21-cm line, N = 512, two polarizations sharing every emitter (the second at
0.8), steep band edges with knees, an in-band shoulder, gain drift; scored per kind with
the issue's targets (recall >= 0.95 at INR >= 1, TDMA >= 0.85, fractional-dump pulses
>= 0.75, persistent carriers >= 0.85 at INR 0.5-1, false alarms <= 0.3 % with the band
edges, the 21-cm line losing <= 0.5 %), with the shipped L-band config.  Tuned on seeds
1-4; judged on 1001-1004 (``--heldout``), not looked at while tuning.

Targets (from the quality issue): recall >= 0.97 for INR >= 1 in every kind, >= 0.85
for INR 0.5-1; false alarms <= 0.3 % of clean samples; on stationary noise the
kurtosis detector's own rate within 20 % of 2 x PFA; at least twice the sigma clip's
recall for INR 1-2 at equal false alarms.
"""

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

from rfisieve import bits
from rfisieve.evaluate.score import (DECISION_BITS, INR_BINS, PRIOR_BITS, add_counts, count_arrays,
                                    finish, parse_kinds)

NTIME, NCHAN, ACC = 2048, 256, 256
LEVELS = (0.7, 1.5, 3.0, 8.0)   # one per targeted INR bin: 0.5-1, 1-2, 2-5, >=5


def _carriers():
    out = []
    inrs = (0.6, 0.8, 1.2, 1.6, 2.5, 4.0, 8.0, 30.0)
    for i, inr in enumerate(inrs):
        out.append({"kind": "carrier", "channel": 20 + 24 * i, "inr": inr, "name": f"carrier {inr}"})
        # the same strength for a part of the scan only, in another channel
        out.append({"kind": "carrier", "channel": 32 + 24 * i, "inr": inr, "start": 300 + 150 * i,
                    "stop": 700 + 150 * i, "name": f"carrier {inr} (part)"})
    return out


def _pulsed():
    out = []
    for i, inr in enumerate(LEVELS + (20.0,)):
        c = 10 + 48 * i
        out.append({"kind": "pulsed", "channels": [c, c + 4], "inr": inr, "duty": 0.02,
                    "start": 200, "stop": 1800, "name": f"pulse train every dump {inr}"})
        out.append({"kind": "pulsed", "channels": [c + 20, c + 22], "inr": inr, "duty": 0.05,
                    "period": 12, "on": 1, "name": f"rotating radar {inr}"})
    return out


def _bursts():
    out = []
    t = 100
    for rep in range(3):
        for inr in LEVELS:
            n = 1 + (rep % 3)
            out.append({"kind": "burst", "inr": inr, "start": t, "stop": t + n, "name": f"burst {inr}"})
            t += 150
    return out


def _drifting():
    out = []
    for i, inr in enumerate(LEVELS + (25.0,)):
        out.append({"kind": "drifting", "channel": 15 + 50 * i, "inr": inr,
                    "drift_channels_per_dump": 0.01 if i % 2 == 0 else 0.004,
                    "start": 100, "stop": 1900, "name": f"drifting {inr}"})
    return out


def _noiselike():
    out = []
    for i, inr in enumerate(LEVELS):
        c = 12 + 60 * i
        out.append({"kind": "noiselike", "channels": [c, c + 8], "inr": inr, "start": 400, "stop": 1000,
                    "name": f"noise block {inr}"})
        out.append({"kind": "noiselike", "channels": [c + 30, c + 31], "inr": inr,
                    "name": f"noise channel {inr}"})
    return out


def _mixed(seed):
    rng = np.random.default_rng(seed)
    out = []
    for i, inr in enumerate(LEVELS):
        out.append({"kind": "carrier", "channel": 8 + 60 * i, "inr": inr})
        out.append({"kind": "intermittent", "channel": 30 + 60 * i, "inr": inr, "signal": "carrier",
                    "on_fraction": 0.3, "mean_on": 20})
        out.append({"kind": "intermittent", "channels": [45 + 60 * i, 48 + 60 * i], "inr": inr,
                    "signal": "noise", "on_fraction": 0.2, "mean_on": 8})
        t = int(rng.integers(50, NTIME - 60))
        out.append({"kind": "burst", "inr": inr, "start": t, "stop": t + 2})
        out.append({"kind": "pulsed", "channels": [20 + 60 * i, 23 + 60 * i], "inr": inr, "duty": 0.03})
        out.append({"kind": "noiselike", "channels": [52 + 60 * i, 56 + 60 * i], "inr": inr,
                    "start": 1200, "stop": 1500})
    return out


QUIET = dict(ripple=False, gain_drift=False, sky_drift=False, dropped_fraction=0.0, upstream_flag_fraction=0.0)

#: name -> (description, simulate_scan keyword arguments)
SCENES = {
    "noise": ("stationary noise only", dict(emitters=[], **QUIET)),
    "noise_s2": ("stationary noise only, with /s2 (per-dump kurtosis)", dict(emitters=[], with_s2=True, **QUIET)),
    "carriers": ("strong and weak carriers (INR 0.6-30), whole scan and part", dict(emitters=_carriers(), **QUIET)),
    "pulsed": ("pulse trains shorter than a dump (duty 2-5 %)", dict(emitters=_pulsed(), **QUIET)),
    "bursts": ("broadband bursts of 1-3 dumps", dict(emitters=_bursts(), **QUIET)),
    "drifting": ("drifting carriers", dict(emitters=_drifting(), **QUIET)),
    "noiselike": ("noise-like blocks (Gaussian; invisible to kurtosis)", dict(emitters=_noiselike(), **QUIET)),
    "ripple": ("bandpass ripple, gain and sky drift, 1 % dropped dumps, upstream flags, mixed emitters",
               dict(emitters=_mixed(7), ripple=True, gain_drift=True, sky_drift=True, dropped_fraction=0.01,
                    upstream_flag_fraction=0.002)),
    "s2": ("backend-recorded /s2 (per-dump kurtosis), mixed emitters",
           dict(emitters=_mixed(8), with_s2=True, **QUIET)),
}


def simulate(name, outdir, seed, ntime, nchan, accumulations):
    from rfisieve.sim.scans import simulate_scan

    _, kw = SCENES[name]
    kw = dict(kw)
    acc = accumulations
    if kw.get("with_s2"):
        acc = min(acc, 64)   # raw spectra are drawn one by one for /s2: keep it small
    path = Path(outdir) / f"qro_bench_{name}_L.h5"
    truth = Path(outdir) / f"qro_bench_{name}_L.truth.h5"
    simulate_scan(path, truth, band="L", ntime=ntime, nchan=nchan, antennas=("q01", "q02"), feeds=("h",), cross=False,
                  accumulations=acc, seed=seed, **kw)
    return path, truth


def read_truth(path):
    with h5py.File(path, "r") as f:
        return f["inr"][()], f["kind"][()], f["dropped"][()].astype(bool), parse_kinds(f.attrs.get("kinds"))


def clip_mask(values, invalid, prior, sigma):
    """astropy sigma_clip per channel along time; returns a uint8 mask with rfisieve's
    prior bits (input/invalid/static) so that both are scored on the same samples."""
    import warnings

    from astropy.stats import sigma_clip

    warnings.filterwarnings("ignore", message="Input data contains invalid values")
    out = prior.copy()
    for p in range(values.shape[2]):
        v = np.where(invalid[:, :, p], np.nan, values[:, :, p]).astype(np.float64)
        clipped = sigma_clip(v, sigma=sigma, axis=0, maxiters=5, masked=True, copy=False)
        hit = np.ma.getmaskarray(clipped) & ~invalid[:, :, p]
        out[:, :, p][hit] |= bits.SUMTHRESHOLD
    return out


def matched_clip(values, invalid, prior, inr, kind, dropped, kinds, target_fa):
    """Bisection on sigma (log scale) so that the clip's false-alarm rate equals target_fa."""
    lo, hi = 1.5, 40.0

    def fa(s):
        m = clip_mask(values, invalid, prior, s)
        c = count_arrays(m, inr, kind, dropped)
        return c["false_alarms"] / max(1, c["clean_scored"]), m, c

    best = None
    for _ in range(18):
        mid = float(np.sqrt(lo * hi))
        rate, m, c = fa(mid)
        if best is None or abs(rate - target_fa) < abs(best[1] - target_fa):
            best = (mid, rate, m, c)
        if rate > target_fa:
            lo = mid
        else:
            hi = mid
        if hi / lo < 1.002:
            break
    return best


def run_scene(name, tmp, band, run, seed, ntime, nchan, acc):
    from rfisieve.engine import flag_scan
    from rfisieve.io.scan import open_scan
    from rfisieve.detect.masks import amplitude

    t0 = time.time()
    scan, truth = simulate(name, tmp, seed, ntime, nchan, acc)
    t_sim = time.time() - t0
    out = Path(tmp) / f"mask_{name}.h5"
    t0 = time.time()
    flag_scan(scan, out, band, run)
    t_flag = time.time() - t0
    with h5py.File(out, "r") as f:
        mask = f["flags"][()]
    inr, kind, dropped, kinds = read_truth(truth)
    with open_scan(scan) as s:
        block = s.read(0, s.ntime)
        values = np.stack([amplitude(block["data"][:, :, p], s.autos[p]) for p in range(s.nprod)], axis=-1)
        meta = {"has_s2": s.has_s2, "accumulations": s.accumulations}
    ours = count_arrays(mask, inr, kind, dropped)
    prior = (mask & PRIOR_BITS).astype(np.uint8)
    invalid = ((mask & bits.INVALID) != 0) | ((mask & bits.UPSTREAM) != 0) | ~np.isfinite(values)
    fa_ours = ours["false_alarms"] / max(1, ours["clean_scored"])
    t0 = time.time()
    sigma, fa_clip, _, clip = matched_clip(values, invalid, prior, inr, kind, dropped, kinds, fa_ours)
    t_clip = time.time() - t0
    clean_scored = (inr == 0) & ~dropped[:, None, None] & (prior == 0)
    per_bit = {nm: float(np.count_nonzero(clean_scored & ((mask & v) != 0)) / max(1, clean_scored.sum()))
               for nm, v in (("sk", bits.SK), ("sumthreshold", bits.SUMTHRESHOLD),
                             ("grown", bits.GROWN), ("cut", bits.CUT))}
    return {"name": name, "ours": ours, "clip": clip, "kinds": kinds, "sigma": sigma, "fa_clip": fa_clip,
            "per_bit_fa": per_bit, "meta": meta, "times": (t_sim, t_flag, t_clip)}


def _r(x):
    return "   -  " if x is None else f"{x:6.4f}"


def print_scene(res, band):
    a, b = finish(res["ours"], res["kinds"]), finish(res["clip"], res["kinds"])
    desc = SCENES[res["name"]][0]
    t_sim, t_flag, t_clip = res["times"]
    print(f"\n== scene {res['name']}: {desc}")
    print(f"   (/s2: {res['meta']['has_s2']}, accumulations {res['meta']['accumulations']}; "
          f"simulate {t_sim:.1f} s, flag {t_flag:.1f} s, sigma-clip bisection {t_clip:.1f} s)")
    fa_a, fa_b = a["clean"]["rate"], b["clean"]["rate"]
    pb = res["per_bit_fa"]
    print(f"   false alarms: rfisieve {100 * fa_a:.4f} % (sk {100 * pb['sk']:.4f}, sumthreshold "
          f"{100 * pb['sumthreshold']:.4f}, grown {100 * pb['grown']:.4f}, cut "
          f"{100 * pb['cut']:.4f} %) of {a['clean']['samples']} clean; "
          f"sigma clip {100 * fa_b:.4f} % at sigma = {res['sigma']:.3f}")
    bins = INR_BINS[1:] + (">=1",)
    print(f"   {'recall':<22}" + "".join(f" {bn:>15}" for bn in bins))
    print(f"   {'(rfisieve, sigma clip)':<22}" + "".join(f" {'ours    clip':>15}" for _ in bins))

    def row(label, ea, eb):
        cells = []
        for bn in bins:
            if ea[bn]["samples"] == 0:
                cells.append(f" {'':>15}")
            else:
                cells.append(" " + f"{_r(ea[bn]['recall'])} {_r(eb[bn]['recall'])}".rjust(15))
        print(f"   {label:<22}" + "".join(cells))

    row("all kinds", a["recall_by_inr"], b["recall_by_inr"])
    for k in sorted(a["recall_by_kind"]):
        row(f"  {k}", a["recall_by_kind"][k], b["recall_by_kind"][k])
    n = a["recall_by_inr"]
    print("   samples per bin: " + ", ".join(f"{bn} {n[bn]['samples']}" for bn in INR_BINS))
    return a, b


# -- field scenes (rfisieve.sim.field): receivers' bandpasses, two polarizations ---------
#: name -> (description, emitter kinds).  Every field scene has steep band edges with
#: knees, an in-band shoulder, gain drift, two polarizations sharing the emitters (the
#: second at 0.8), 1-sigma carriers on the knees and the 21-cm line in the view.
FIELD_SCENES = {
    "field_quiet": ("steep edges and knees, gain drift, the 21-cm line, knee carriers only", ()),
    "field_extended": ("satellites, wideband transmitters, switching extended emitters",
                       ("satellite", "wideband", "switching")),
    "field_bursty": ("TDMA frames, fractional-dump pulses, compact pulses", ("tdma", "fracpulse", "compact")),
    "field_carriers": ("persistent and wandering weak carriers", ("carrier", "wandering")),
}
#: Seeds tuned on; the held-out seeds (``--heldout``) are these plus HELDOUT_OFFSET.
HELDOUT_OFFSET = 1000
#: Dumps and channels of a field scene unless --ntime / --nchan say otherwise.
FIELD_SHAPE = (4096, 1024)
FIELD_TARGETS = {"tdma": 0.85, "fracpulse": 0.75}
PROTECTED_CODE = 100


def run_field_scene(name, tmp, band, run, seed, ntime, nchan, standing_wave=None, second_strength=0.8):
    from rfisieve.engine import flag_scan
    from rfisieve.sim.field import field_scene, write_field_scene

    t0 = time.time()
    from rfisieve.sim.model import DEFAULT_VIEW

    lo, hi = DEFAULT_VIEW[band["band"]]
    # the L band's view is centred on the 21-cm line; the others' on their default view
    centre = 1420.0e6 if band["band"] == "L" else 0.5 * (lo + hi)
    scene = field_scene(FIELD_SCENES[name][1], seed, ntime=ntime, nchan=nchan, f_center_hz=centre,
                        standing_wave=standing_wave, second_strength=second_strength)
    scan, truth = Path(tmp) / f"field_{name}.h5", Path(tmp) / f"field_{name}.truth.h5"
    write_field_scene(scan, truth, scene, band=band["band"])
    t_sim = time.time() - t0
    out = Path(tmp) / f"mask_{name}.h5"
    t0 = time.time()
    flag_scan(scan, out, band, run)
    t_flag = time.time() - t0
    with h5py.File(out, "r") as f:
        mask = f["flags"][()]
    from rfisieve.detect.masks import static_channels
    from rfisieve.sim.field import FIELD_KINDS
    kinds = {c: k for k, c in FIELD_KINDS.items()}
    # interference inside protected ranges is scored apart: the persistence test is
    # off there by design (and 1400-1427 MHz is closed to all emissions, ITU Radio
    # Regulations footnote 5.340; from memory)
    kind = scene["kind"].copy()
    prot = static_channels(scene["freq"], band.get("protect"))
    kind[:, prot, :] = np.where(kind[:, prot, :] > 0, kind[:, prot, :] + PROTECTED_CODE, 0)
    kinds.update({c + PROTECTED_CODE: f"{k} (protected)" for k, c in FIELD_KINDS.items()})
    counts = count_arrays(mask, scene["inr"], kind, np.zeros(mask.shape[0], bool))
    decided = (mask & DECISION_BITS) != 0
    sky = scene["sky"]
    edges = np.zeros(mask.shape, bool)
    edges[:, :32] = edges[:, -32:] = True
    clean = (scene["inr"] == 0) & ((mask & PRIOR_BITS) == 0)
    return {"name": name, "counts": counts, "kinds": kinds, "times": (t_sim, t_flag),
            "sky_loss": float(decided[sky].mean()) if sky.any() else None,
            "edge_fa": float(decided[clean & edges].mean()),
            "pol_fa": [float(decided[:, :, p][clean[:, :, p]].mean()) for p in range(mask.shape[2])],
            "per_bit_fa": {nm: float(np.count_nonzero(clean & ((mask & v) != 0)) / max(1, clean.sum()))
                           for nm, v in (("sk", bits.SK), ("sumthreshold", bits.SUMTHRESHOLD),
                                         ("grown", bits.GROWN), ("cut", bits.CUT))}}


def _standing_wave(text):
    """``AMP,PATH_M`` of --standing-wave as two floats."""
    try:
        amp, path = (float(v) for v in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected AMP,PATH_M such as 0.01,40") from None
    if not (0 <= amp < 1 and path > 0):
        raise argparse.ArgumentTypeError(f"{text!r}: AMP in [0, 1), PATH_M > 0")
    return amp, path


def main_field(args, band, run):
    seed0 = args.seed + (HELDOUT_OFFSET if args.heldout else 0)
    print(f"field scenes: {args.ntime} dumps x {args.nchan} channels of 62.5 kHz x 2 polarizations, "
          f"N = 512, seeds {seed0}..{seed0 + len(args.field) - 1}"
          f"{' (held out: not looked at while tuning)' if args.heldout else ' (tuning set)'}"
          + (f"; a second standing wave of {args.standing_wave[0]:g} at a {args.standing_wave[1]:g} m path"
             if args.standing_wave else "")
          + (f"; the second polarization sees the emitters at {args.second_strength:g}"
             if args.second_strength != 0.8 else ""))
    pooled, kinds_all, results = None, {}, []
    with tempfile.TemporaryDirectory(prefix="rfisieve-field-") as tmp:
        for i, name in enumerate(args.field):
            res = run_field_scene(name, tmp, band, run, seed0 + list(FIELD_SCENES).index(name),
                                  args.ntime, args.nchan, args.standing_wave,
                                  args.second_strength)
            a = finish(res["counts"], res["kinds"])
            results.append((res, a))
            kinds_all.update(res["kinds"])
            pooled = add_counts(pooled, res["counts"])
            pb = res["per_bit_fa"]
            print(f"\n== field scene {name}: {FIELD_SCENES[name][0]} (simulate {res['times'][0]:.1f} s, "
                  f"flag {res['times'][1]:.1f} s)")
            print(f"   false alarms {100 * a['clean']['rate']:.4f} % of {a['clean']['samples']} clean "
                  f"(sk {100 * pb['sk']:.4f}, sumthreshold {100 * pb['sumthreshold']:.4f}, grown "
                  f"{100 * pb['grown']:.4f}, cut {100 * pb['cut']:.4f} %); within 32 channels of the band "
                  f"edges {100 * res['edge_fa']:.4f} %; per polarization "
                  + ", ".join(f"{100 * x:.4f} %" for x in res["pol_fa"]))
            if res["sky_loss"] is not None:
                print(f"   21-cm line samples flagged: {100 * res['sky_loss']:.3f} %")
            bins = INR_BINS[1:] + (">=1",)
            print(f"   {'recall':<14}" + "".join(f" {bn:>8}" for bn in bins))
            for k, e in sorted(a["recall_by_kind"].items()):
                print(f"   {k:<14}" + "".join(f" {_r(e[bn]['recall']):>8}" if e[bn]["samples"] else " " * 9
                                             for bn in bins))
            sys.stdout.flush()
    pa = finish(pooled, kinds_all)
    print("\n== field scenes pooled: targets")
    ok_all = True

    def check(label, ok, detail):
        nonlocal ok_all
        ok_all &= bool(ok)
        print(f"   [{'met ' if ok else 'MISS'}] {label}: {detail}")

    for k, e in sorted(pa["recall_by_kind"].items()):
        if k.endswith("(protected)"):
            print(f"   [info] recall INR >= 1, {k}: {e['>=1']['recall']} (persistence test off there by design)")
            continue
        r1, need = e[">=1"]["recall"], FIELD_TARGETS.get(k, 0.95)
        if r1 is not None:
            check(f"recall INR >= 1, {k}", r1 >= need, f"{r1:.4f} (>= {need})")
        if k == "carrier" and e["0.5-1"]["recall"] is not None:
            check("recall INR 0.5-1, carrier", e["0.5-1"]["recall"] >= 0.85, f"{e['0.5-1']['recall']:.4f} (>= 0.85)")
    for res, a in results:
        check(f"false alarms, {res['name']}", a["clean"]["rate"] <= 0.003,
              f"{100 * a['clean']['rate']:.4f} % (<= 0.3 %; band edges {100 * res['edge_fa']:.4f} %)")
        if res["sky_loss"] is not None:
            check(f"21-cm line loss, {res['name']}", res["sky_loss"] <= 0.005, f"{100 * res['sky_loss']:.3f} % (<= 0.5 %)")
    print(f"\n{'all field targets met' if ok_all else 'some field targets missed'}")
    return 0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scenes", nargs="+", choices=list(SCENES), default=list(SCENES))
    ap.add_argument("--ntime", type=int, default=None,
                    help=f"dumps per scene (default {NTIME}; field scenes {FIELD_SHAPE[0]})")
    ap.add_argument("--nchan", type=int, default=None,
                    help=f"channels per scene (default {NCHAN}; field scenes {FIELD_SHAPE[1]})")
    ap.add_argument("--accumulations", type=int, default=ACC)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--set", dest="sets", action="append", default=[], metavar="KEY=VALUE",
                    help="band-setting override, e.g. sumthreshold.chi1=5.5 (repeatable)")
    ap.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    ap.add_argument("--field", nargs="*", choices=list(FIELD_SCENES), default=None,
                    help="run the field scenes (all when none named) instead of the simulator's scenes")
    ap.add_argument("--heldout", action="store_true", help="field scenes on the held-out seeds")
    ap.add_argument("--standing-wave", type=_standing_wave, metavar="AMP,PATH_M",
                    help="field scenes: add a second standing wave to each bandpass, relative amplitude "
                         "AMP with the period c / (2 PATH_M) of a reflection path of PATH_M metres "
                         "(e.g. 0.01,40: 1 %% every 3.75 MHz)")
    ap.add_argument("--second-strength", type=float, default=0.8, metavar="S",
                    help="field scenes: the second polarization's share of each emitter's INR (default 0.8; "
                         "0 puts every emitter in the first polarization only, whose false alarms in the "
                         "second then show what flagging a feed pair together costs)")
    ap.add_argument("--band", default="L", choices=("P", "L", "C"),
                    help="field scenes: the shipped band config and view to use (default L)")
    args = ap.parse_args(argv)

    from rfisieve.config.load import parse_set
    from rfisieve.config.defaults import band_settings, run_settings
    from scipy.stats import norm

    override = parse_set(args.sets)
    override["band"] = "L"
    band = band_settings(override)
    run = run_settings({"workers": args.workers, "scheduler": "threads", "chunk_dumps": 1024})
    if args.field is not None:
        # the field scenes are judged with the shipped L-band config (its protected lines)
        from rfisieve.config.defaults import merge
        from rfisieve.config.load import load_band

        band = merge(load_band(str(Path(__file__).resolve().parent.parent / "config" / "bands"), args.band)[0],
                     parse_set(args.sets))
        args.field = args.field or list(FIELD_SCENES)
        args.ntime = args.ntime or FIELD_SHAPE[0]
        args.nchan = args.nchan or FIELD_SHAPE[1]
        print(f"band settings: the shipped config/bands/{args.band}.yaml"
              + (f" with overrides {json.dumps(parse_set(args.sets))}" if args.sets else ""))
        return main_field(args, band, run)
    args.ntime, args.nchan = args.ntime or NTIME, args.nchan or NCHAN
    print(f"rfisieve flagging-quality benchmark: {len(args.scenes)} scene(s) of {args.ntime} dumps x "
          f"{args.nchan} channels x 2 auto products, accumulations {args.accumulations}, seed {args.seed}")
    print("band settings: defaults" + (f" with overrides {json.dumps(parse_set(args.sets))}" if args.sets else ""))
    pooled = {"ours": None, "clip": None}
    results = []
    kinds_all = {}
    t_all = time.time()
    with tempfile.TemporaryDirectory(prefix="rfisieve-quality-") as tmp:
        for i, name in enumerate(args.scenes):
            res = run_scene(name, tmp, band, run, args.seed + list(SCENES).index(name), args.ntime, args.nchan,
                            args.accumulations)
            a, b = print_scene(res, band)
            sys.stdout.flush()
            kinds_all.update(res["kinds"])
            results.append((res, a, b))
            if not name.startswith("noise_") and name != "noise":
                pooled["ours"] = add_counts(pooled["ours"], res["ours"])
                pooled["clip"] = add_counts(pooled["clip"], res["clip"])
    pa, pb = {"recall_by_kind": {}}, {}
    if pooled["ours"] is not None:     # scenes with interference were run
        print("\n== all scenes with interference, pooled (each scene's clip at its own matched sigma)")
        pa, pb = finish(pooled["ours"], kinds_all), finish(pooled["clip"], kinds_all)
        bins = INR_BINS[1:] + (">=1",)
        print(f"   {'recall ours / clip':<22}" + "".join(f" {bn:>15}" for bn in bins))
        for label, ea, eb in [("all kinds", pa["recall_by_inr"], pb["recall_by_inr"])] + \
                [(f"  {k}", pa["recall_by_kind"][k], pb["recall_by_kind"][k]) for k in sorted(pa["recall_by_kind"])]:
            print(f"   {label:<22}" + "".join(
                " " + f"{_r(ea[bn]['recall'])} {_r(eb[bn]['recall'])}".rjust(15) if ea[bn]["samples"] else " " * 16
                for bn in bins))

    # -- targets --------------------------------------------------------------------
    print("\n== targets")
    ok_all = True

    def check(label, ok, detail):
        nonlocal ok_all
        ok_all &= bool(ok)
        print(f"   [{'met ' if ok else 'MISS'}] {label}: {detail}")

    for k, e in sorted(pa["recall_by_kind"].items()):
        r1 = e[">=1"]["recall"]
        if r1 is not None:
            check(f"recall INR >= 1, {k}", r1 >= 0.97, f"{r1:.4f} (>= 0.97)")
        r05 = e["0.5-1"]["recall"]
        if r05 is not None:
            check(f"recall INR 0.5-1, {k}", r05 >= 0.85, f"{r05:.4f} (>= 0.85)")
    for res, a, _ in results:
        fa = a["clean"]["rate"]
        check(f"false alarms, {res['name']}", fa <= 0.003, f"{100 * fa:.4f} % (<= 0.3 %)")
        if res["name"] in ("noise", "noise_s2") and band["kurtosis"]["enabled"]:
            k = band["kurtosis"]
            pfa = k["pfa"] if k.get("pfa") is not None else float(norm.sf(k["sigma"]))
            sk = res["per_bit_fa"]["sk"]
            check(f"kurtosis rate on {res['name']} vs 2 PFA", abs(sk / (2 * pfa) - 1) <= 0.2,
                  f"{100 * sk:.4f} % vs 2 PFA = {100 * 2 * pfa:.4f} % (ratio {sk / (2 * pfa):.3f}, within 0.8-1.2)")
    for res, a, b in results:
        ra, rb = a["recall_by_inr"]["1-2"]["recall"], b["recall_by_inr"]["1-2"]["recall"]
        if ra is not None:
            ratio = ra / rb if rb else float("inf")
            check(f"INR 1-2 recall vs sigma clip, {res['name']}", ratio >= 2.0,
                  f"{ra:.4f} vs {rb:.4f} (x{ratio:.2f}; >= x2)")
    print(f"\n{'all targets met' if ok_all else 'some targets missed'}; total {time.time() - t_all:.0f} s")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({r["name"]: {"ours": a, "clip": b, "sigma": r["sigma"], "per_bit_fa": r["per_bit_fa"]}
                       for r, a, b in results} | {"pooled": {"ours": pa, "clip": pb}}, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
