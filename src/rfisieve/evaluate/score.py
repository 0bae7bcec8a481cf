"""Score a mask against the truth of a simulated scan: recall, false alarms, data lost.

The truth file ``<scan>.truth.h5`` (written by the simulator) holds

* ``/inr`` float32 ``(ntime, nchan, nprod)``: per-sample interference-to-noise ratio,
  the excess mean power from interference in the dump over that dump's noise rms
  (0 where clean);
* ``/kind`` uint8, same shape: the kind of emitter (0 = clean), with the root attribute
  ``kinds`` = JSON mapping code -> name;
* ``/dropped`` bool ``(ntime,)``: dumps the backend dropped.

Which samples are scored
------------------------
A sample is *scored* when its dump is not dropped and the mask gives it none of the
bits that are not the flagger's decision: input (bit 0, flagged upstream), invalid
(bit 1) and known (bit 2, a known-bad range of the band config).  Those samples are
flagged whatever the detectors do, so counting them would flatter recall and hide
false alarms; they are reported separately.  On scored samples,

* *recall* in a bin = fraction of the interference samples (``inr > 0``) in that bin
  carrying any decision bit (sk, sumthreshold, grown, cut);
* *false-alarm rate* = fraction of clean samples (``inr == 0``) carrying a decision bit.

*Clean data lost* is reported per cause bit over every clean sample of a valid dump
(``inr == 0``, not dropped, not invalid), including the input- and static-flagged
ones, because that is what the science loses; a sample can carry several bits.

The functions :func:`count_arrays`, :func:`add_counts` and :func:`finish` work on
plain numpy arrays (so that files can be read chunk by chunk);
:func:`score_arrays` chains them, :func:`score_files` reads the two files in chunks.
"""

import argparse
import json
import math

import numpy as np

from rfisieve import bits
from rfisieve.errors import ScanError
from rfisieve.textfmt import pct
from rfisieve.commands import add_command

#: Recall bins of INR, [lo, hi).  Per-sample INR below 0.5 is reported but not targeted.
INR_EDGES = (0.5, 1.0, 2.0, 5.0)
INR_BINS = ("<0.5", "0.5-1", "1-2", "2-5", ">=5")
#: Bits set regardless of the detectors: left out of the scored samples.
PRIOR_BITS = bits.UPSTREAM | bits.INVALID | bits.KNOWN
#: Bits that are the flagger's decision.
DECISION_BITS = bits.SK | bits.SUMTHRESHOLD | bits.GROWN | bits.CUT

_NBIN = len(INR_BINS)
_NCODE = 256


def parse_kinds(value):
    """The truth file's ``kinds`` attribute (JSON code -> name) as ``{int: str}``."""
    if value is None:
        return {}
    if isinstance(value, bytes):
        value = value.decode("utf-8")
    if isinstance(value, np.ndarray):
        value = value.item() if value.shape == () else str(value)
        if isinstance(value, bytes):
            value = value.decode("utf-8")
    mapping = json.loads(value) if isinstance(value, str) else dict(value)
    return {int(k): str(v) for k, v in mapping.items()}


def count_arrays(mask, inr, kind, dropped):
    """Raw counts for one block of samples (any number of dumps).

    Parameters
    ----------
    mask : uint8 ndarray (ntime, nchan, nprod)
        Mask bits (rfisieve.bits).
    inr : float ndarray, same shape
        Truth interference-to-noise ratio per sample, 0 where clean.
    kind : integer ndarray, same shape
        Truth emitter kind code per sample (0 where clean).
    dropped : bool ndarray (ntime,)
        Dumps dropped by the backend.

    Returns
    -------
    dict of int64 ndarrays, to be summed with :func:`add_counts`.
    """
    mask = np.asarray(mask, dtype=np.uint8)
    inr = np.asarray(inr)
    kind = np.asarray(kind)
    dropped = np.asarray(dropped, dtype=bool)
    if inr.shape != mask.shape or kind.shape != mask.shape:
        raise ValueError(f"mask {mask.shape}, inr {inr.shape} and kind {kind.shape} differ in shape")
    if dropped.shape != mask.shape[:1]:
        raise ValueError(f"dropped has shape {dropped.shape}, expected ({mask.shape[0]},)")
    live = ~dropped.reshape((-1,) + (1,) * (mask.ndim - 1))
    live = np.broadcast_to(live, mask.shape)
    prior = (mask & PRIOR_BITS) != 0
    scored = live & ~prior
    decided = (mask & DECISION_BITS) != 0
    finite = np.where(np.isfinite(inr), inr, 0)
    rfi = finite > 0
    clean_all = live & ~rfi & ((mask & bits.INVALID) == 0)

    sel = rfi & scored
    code = np.asarray(kind, dtype=np.int64)[sel] * _NBIN + np.digitize(finite[sel], INR_EDGES)
    rfi_total = np.bincount(code, minlength=_NCODE * _NBIN)
    rfi_flagged = np.bincount(code[decided[sel]], minlength=_NCODE * _NBIN)

    clean_scored = clean_all & ~prior
    lost = np.array([np.count_nonzero(clean_all & ((mask & value) != 0)) for _, value, _, _ in bits.BIT_TABLE],
                    dtype=np.int64)
    return {
        "samples": np.int64(mask.size),
        "dropped": np.int64(np.count_nonzero(~live)),
        "prior_by_bit": np.array([np.count_nonzero(live & ((mask & v) != 0)) for v in
                                  (bits.UPSTREAM, bits.INVALID, bits.KNOWN)], dtype=np.int64),
        "prior_rfi": np.int64(np.count_nonzero(live & prior & rfi)),
        "prior_any": np.int64(np.count_nonzero(live & prior)),
        "rfi_total": rfi_total.astype(np.int64),
        "rfi_flagged": rfi_flagged.astype(np.int64),
        "clean_all": np.int64(np.count_nonzero(clean_all)),
        "clean_scored": np.int64(np.count_nonzero(clean_scored)),
        "false_alarms": np.int64(np.count_nonzero(clean_scored & decided)),
        "clean_lost_by_bit": lost,
    }


def add_counts(a, b):
    """Sum two count dicts from :func:`count_arrays` (``a`` may be None)."""
    if a is None:
        return {k: np.array(v, copy=True) for k, v in b.items()}
    return {k: a[k] + b[k] for k in a}


def _ratio(k, n):
    return float(k) / float(n) if n else None


def _entry(n, k):
    return {"samples": int(n), "flagged": int(k), "recall": _ratio(k, n)}


def finish(counts, kinds=None):
    """Figures from summed counts: see the module docstring for the definitions.

    Returns a JSON-serialisable dict with keys ``samples``, ``excluded``,
    ``recall_by_inr`` (bin name -> samples, flagged, recall; plus ``">=1"``),
    ``recall_by_kind`` (kind name -> overall and per bin), ``clean`` (samples, false
    alarms, rate) and ``clean_lost_by_bit`` (bit name -> samples, fraction of clean).
    """
    kinds = dict(kinds or {})
    tot = counts["rfi_total"].reshape(_NCODE, _NBIN)
    hit = counts["rfi_flagged"].reshape(_NCODE, _NBIN)

    def bins_of(t, h):
        out = {name: _entry(t[i], h[i]) for i, name in enumerate(INR_BINS)}
        out[">=1"] = _entry(t[2:].sum(), h[2:].sum())
        out["all"] = _entry(t.sum(), h.sum())
        return out

    by_kind = {}
    for code in np.flatnonzero(tot.sum(axis=1)):
        name = kinds.get(int(code), "unknown" if code == 0 else f"code {int(code)}")
        entry = bins_of(tot[code], hit[code])
        if name in by_kind:  # two codes with one name: add them up
            old = by_kind[name]
            entry = {b: _entry(old[b]["samples"] + entry[b]["samples"], old[b]["flagged"] + entry[b]["flagged"])
                     for b in entry}
        by_kind[name] = entry
    clean_all = int(counts["clean_all"])
    inp, inv, sta = (int(x) for x in counts["prior_by_bit"])
    return {
        "samples": int(counts["samples"]),
        "excluded": {
            "dropped_samples": int(counts["dropped"]),
            "upstream": inp, "invalid": inv, "known": sta,
            "prior_flagged": int(counts["prior_any"]),
            "prior_flagged_interference": int(counts["prior_rfi"]),
            "note": "dropped dumps and samples with the upstream, invalid or known bit are not the "
                    "flagger's decision: left out of recall and of the false-alarm rate",
        },
        "recall_by_inr": bins_of(tot.sum(axis=0), hit.sum(axis=0)),
        "recall_by_kind": by_kind,
        "clean": {
            "samples": int(counts["clean_scored"]),
            "false_alarms": int(counts["false_alarms"]),
            "rate": _ratio(counts["false_alarms"], counts["clean_scored"]),
            "note": "clean = inr == 0, dump not dropped, no upstream/invalid/known bit; "
                    "a false alarm carries sk, sumthreshold, grown or cut",
        },
        "clean_lost_by_bit": {
            name: {"bit": idx, "value": value, "samples": int(n), "fraction": _ratio(n, clean_all)}
            for (idx, value, name, _), n in zip(bits.BIT_TABLE, counts["clean_lost_by_bit"])
        },
        "clean_all_samples": clean_all,
    }


def score_arrays(mask, inr, kind, kinds, dropped):
    """Score one mask against its truth, all in memory.

    Parameters
    ----------
    mask : uint8 ndarray (ntime, nchan, nprod)
        Mask bits (docs/design.md 3.2).
    inr : float ndarray, same shape
        Interference-to-noise ratio per sample (0 where clean).
    kind : integer ndarray, same shape
        Emitter kind code per sample.
    kinds : dict or JSON str
        Code -> kind name (the truth file's ``kinds`` attribute).
    dropped : bool ndarray (ntime,)
        Dropped dumps.

    Returns
    -------
    dict
        See :func:`finish`.
    """
    if not isinstance(kinds, dict):
        kinds = parse_kinds(kinds)
    return finish(count_arrays(mask, inr, kind, dropped), kinds)


# -- files ------------------------------------------------------------------------
def _open(path, what):
    import h5py

    try:
        return h5py.File(path, "r")
    except FileNotFoundError:
        raise ScanError(path, f"no such {what} file") from None
    except OSError as err:
        raise ScanError(path, f"cannot be opened as an HDF5 {what} file ({' '.join(str(err).split())[:120]})") from None


def _need(f, path, name, what):
    if name not in f:
        raise ScanError(path, f"{what} file has no {name} dataset")
    return f[name]


def score_files(mask_path, truth_path, chunk_dumps=1024):
    """Score a mask file (``/flags``) against a truth file, reading ``chunk_dumps`` at a time.

    Raises
    ------
    ScanError
        A file is missing, is not HDF5, lacks a dataset or the shapes disagree.
    """
    with _open(mask_path, "mask") as fm, _open(truth_path, "truth") as ft:
        flags = _need(fm, mask_path, "flags", "mask")
        inr = _need(ft, truth_path, "inr", "truth")
        kind = _need(ft, truth_path, "kind", "truth")
        if flags.ndim != 3:
            raise ScanError(mask_path, f"/flags has shape {flags.shape}, expected (ntime, nchan, nprod)")
        for ds in (inr, kind):
            if ds.shape != flags.shape:
                raise ScanError(truth_path, f"{ds.name} has shape {ds.shape} but the mask {mask_path} "
                                            f"has {flags.shape}: not the truth of that scan?")
        ntime = flags.shape[0]
        if "dropped" in ft:
            dropped = np.asarray(ft["dropped"][()], dtype=bool).reshape(-1)
            if dropped.shape != (ntime,):
                raise ScanError(truth_path, f"/dropped has shape {dropped.shape}, expected ({ntime},)")
        else:
            dropped = np.zeros(ntime, dtype=bool)
        try:
            kinds = parse_kinds(ft.attrs.get("kinds"))
        except (ValueError, TypeError):
            raise ScanError(truth_path, "root attribute 'kinds' is not a JSON mapping code -> name") from None
        total = None
        step = max(1, int(chunk_dumps))
        for t0 in range(0, ntime, step):
            t1 = min(ntime, t0 + step)
            c = count_arrays(flags[t0:t1], inr[t0:t1], kind[t0:t1], dropped[t0:t1])
            total = add_counts(total, c)
    out = finish(total, kinds)
    out["mask"] = str(mask_path)
    out["truth"] = str(truth_path)
    return out


# -- text -------------------------------------------------------------------------
def _pct(x, digits=2):
    return pct(x, digits, missing="-", sep=" ")


def _rec(x):
    return "-" if x is None else f"{x:.4f}"


def format_table(result):
    """The figures of :func:`finish` as an aligned plain-text table."""
    lines = []
    if "mask" in result:
        lines.append(f"mask:  {result['mask']}")
        lines.append(f"truth: {result['truth']}")
    ex = result["excluded"]
    lines.append(f"samples: {result['samples']}; left out of the scores (not the flagger's decision): "
                 f"dropped {ex['dropped_samples']}, input/invalid/static {ex['prior_flagged']} "
                 f"(upstream {ex['upstream']}, invalid {ex['invalid']}, known {ex['known']}; "
                 f"of them interference {ex['prior_flagged_interference']})")
    lines.append("")
    lines.append("recall by interference-to-noise ratio (INR) per sample")
    lines.append(f"  {'INR':<8} {'samples':>12} {'flagged':>12} {'recall':>8}")
    rb = result["recall_by_inr"]
    for name in INR_BINS + (">=1",):
        e = rb[name]
        lines.append(f"  {name:<8} {e['samples']:>12} {e['flagged']:>12} {_rec(e['recall']):>8}")
    lines.append("")
    lines.append("recall by kind of emitter")
    head = "".join(f" {b:>8}" for b in INR_BINS[1:] + (">=1",))
    lines.append(f"  {'kind':<14} {'samples':>10}{head}")
    for name, e in sorted(result["recall_by_kind"].items()):
        row = "".join(f" {_rec(e[b]['recall']):>8}" for b in INR_BINS[1:] + (">=1",))
        lines.append(f"  {name:<14} {e['all']['samples']:>10}{row}")
    if not result["recall_by_kind"]:
        lines.append("  (no interference in the truth)")
    lines.append("")
    c = result["clean"]
    lines.append(f"false alarms on clean samples: {c['false_alarms']} of {c['samples']} = {_pct(c['rate'], 3)}")
    lines.append("  (clean = INR 0 in a kept dump, without the upstream/invalid/known bit)")
    lines.append("")
    lines.append(f"clean data lost, by cause bit (of {result['clean_all_samples']} clean samples in kept dumps; "
                 "a sample can carry several bits)")
    lines.append(f"  {'bit':>3} {'cause':<13} {'samples':>12} {'fraction':>10}")
    for name, e in result["clean_lost_by_bit"].items():
        lines.append(f"  {e['bit']:>3} {name:<13} {e['samples']:>12} {_pct(e['fraction'], 3):>10}")
    return "\n".join(lines)


def _json_default(obj):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return None if not math.isfinite(obj) else float(obj)
    raise TypeError(type(obj).__name__)


# -- command line -----------------------------------------------------------------
def cmd_score(args):
    """``rfisieve score``: print the figures of one mask against its truth."""
    result = score_files(args.mask, args.truth, chunk_dumps=args.chunk_dumps)
    if args.json:
        print(json.dumps(result, indent=2, default=_json_default))
    else:
        print(format_table(result))
    return 0


_SCORE_HELP = "score a mask against the truth of a simulated scan (recall, false alarms)"

_SCORE_DESCRIPTION = (
    "Compare a mask file (<outdir>/flags/<scan>.h5) with the truth the simulator wrote\n"
    "(<scan>.truth.h5: /inr, /kind, /dropped) and print:\n"
    "  - recall per interference-to-noise ratio (INR) bin: 0.5-1, 1-2, 2-5, >=5\n"
    "    (INR = the interference's excess mean power in a dump over that dump's noise rms);\n"
    "  - recall per kind of emitter (carrier, pulsed, burst, drifting, ...);\n"
    "  - the false-alarm rate on clean samples;\n"
    "  - the clean data lost to each cause bit of the mask.\n"
    "Dropped dumps and samples with the upstream, invalid or known bit are not the flagger's\n"
    "decision: they are left out of recall and of the false-alarm rate (and counted apart).\n"
    "Clean data lost is over every clean sample of a kept dump, known/upstream included.")

_SCORE_OPTIONS = [
    ("mask", {"metavar": "MASK", "help": "mask file written by the flagger (HDF5 with /flags)"}),
    ("truth", {"metavar": "TRUTH", "help": "truth file of the simulated scan (<scan>.truth.h5)"}),
    ("--json", {"action": "store_true", "help": "print the figures as JSON instead of a table"}),
    ("--chunk-dumps", {"type": int, "default": 1024, "metavar": "N",
                       "help": "dumps read at a time (bounds memory; default: %(default)s)"}),
]


#: The command's texts and options (:func:`rfisieve.commands.add_command`).
_SCORE = {"formatter": argparse.RawDescriptionHelpFormatter, "help": _SCORE_HELP,
          "description": _SCORE_DESCRIPTION,
          "epilog": 'example: rfisieve score results/flags/qro_L_001.h5 sim/qro_L_001.truth.h5 --json',
          "options": _SCORE_OPTIONS}


def register_cli(subparsers):
    """Add the ``score`` subcommand to the ``rfisieve`` command."""
    return add_command(subparsers, "score", cmd_score, **_SCORE)


__all__ = ["score_arrays", "score_files", "count_arrays", "add_counts", "finish", "format_table",
           "parse_kinds", "register_cli", "INR_BINS", "INR_EDGES", "PRIOR_BITS", "DECISION_BITS"]
