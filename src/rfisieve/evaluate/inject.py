"""Inject synthetic interference of known strength into (copies of) real data.

Used by ``rfisieve tune`` and by the injection-recovery tests: the recall of a
flagger is measured on real backgrounds by adding interference whose
interference-to-noise ratio (INR, excess mean power in a dump over that dump's noise
rms, as in the simulator's truth files) is known sample by sample.

Input files are never modified: :func:`copy_scan` writes a new scan file (standard
layout of docs/design.md 3.1) from a scan read through :mod:`rfisieve.io.scan`, optionally with
interference added.

Model: a constant excess power ``c = INR * sigma`` is added to every raw spectrum of
the affected dumps, where ``sigma`` is the channel's noise rms per dump, estimated
robustly from first differences along time (so a smooth bandpass and slow drifts do
not count as noise).  For an auto product the dump power becomes ``P + c`` and, when
the scan records ``/s2``, the sum of squared raw powers becomes
``S2 + 2 c M P + M c^2`` (``M`` = accumulations; from ``sum (p_i + c)^2``).  A cross
product's amplitude is raised by exactly ``c`` (its phase is kept).
"""

import numpy as np

from rfisieve.detect.background import MAD_TO_SIGMA

#: Kind codes of the injected structures (names as in the simulator's truth files).
KINDS = {1: "carrier", 3: "burst", 5: "intermittent"}
CODE = {name: code for code, name in KINDS.items()}

# MAD_TO_SIGMA = 1 / Phi^-1(3/4): MAD -> sigma for a Gaussian (common practice);
# sqrt(2): a difference of two independent samples has twice the variance.


def robust_rms(values, invalid=None):
    """Noise rms per channel of a (time, chan) plane, from first differences along time.

    ``sigma = 1.4826 * median(|x[t+1] - x[t]|) / sqrt(2)`` over valid pairs: the
    median absolute deviation of differences (common practice), insensitive to the
    bandpass, to slow gain drifts and to sparse interference.  Channels without two
    valid neighbouring samples get NaN.
    """
    x = np.asarray(values, dtype=np.float64)
    d = np.abs(np.diff(x, axis=0))
    ok = np.isfinite(d)
    if invalid is not None:
        inv = np.asarray(invalid, dtype=bool)
        ok &= ~(inv[1:] | inv[:-1])
    d = np.where(ok, d, np.nan)
    with np.errstate(all="ignore"):
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            med = np.nanmedian(d, axis=0)
    return MAD_TO_SIGMA * med / np.sqrt(2.0)


def plan_injections(ntime, nchan, rng, levels=(1.0, 2.0, 5.0), fraction=0.01):
    """Random interference structures covering about ``fraction`` of a (time, chan) plane.

    Three shapes, in equal shares of the injected samples and cycling through
    ``levels`` of INR: narrowband carriers (one channel, 64-512 dumps), broadband
    bursts (every channel, 1-3 dumps) and intermittent blobs (2-8 channels x 4-32
    dumps).

    Returns
    -------
    list of dict(kind, t0, t1, c0, c1, inr)
    """
    rng = np.random.default_rng(rng)
    budget = max(1.0, fraction * ntime * nchan / 3.0)
    out = []
    level = 0

    def add(kind, t0, t1, c0, c1):
        nonlocal level
        out.append({"kind": kind, "t0": int(t0), "t1": int(t1), "c0": int(c0), "c1": int(c1),
                    "inr": float(levels[level % len(levels)])})
        level += 1
        return (t1 - t0) * (c1 - c0)

    for kind in ("carrier", "burst", "intermittent"):
        used = 0.0
        while used < budget:
            if kind == "carrier":
                n = int(min(ntime, rng.integers(64, 513)))
                t0 = int(rng.integers(0, ntime - n + 1))
                c0 = int(rng.integers(0, nchan))
                used += add(kind, t0, t0 + n, c0, c0 + 1)
            elif kind == "burst":
                n = int(min(ntime, rng.integers(1, 4)))
                t0 = int(rng.integers(0, ntime - n + 1))
                used += add(kind, t0, t0 + n, 0, nchan)
            else:
                n = int(min(ntime, rng.integers(4, 33)))
                w = int(min(nchan, rng.integers(2, 9)))
                t0 = int(rng.integers(0, ntime - n + 1))
                c0 = int(rng.integers(0, nchan - w + 1))
                used += add(kind, t0, t0 + n, c0, c0 + w)
    return out


def truth_planes(shape, injections):
    """INR and kind planes (time, chan) of a list of structures (the strongest wins)."""
    inr = np.zeros(shape, dtype=np.float32)
    kind = np.zeros(shape, dtype=np.uint8)
    for s in injections:
        sl = (slice(s["t0"], s["t1"]), slice(s["c0"], s["c1"]))
        stronger = s["inr"] > inr[sl]
        inr[sl] = np.where(stronger, s["inr"], inr[sl])
        kind[sl] = np.where(stronger, CODE[s["kind"]], kind[sl])
    return inr, kind


def add_interference(data, inr, rms, auto, s2=None, accumulations=1):
    """Add excess power ``inr * rms`` (per sample) to one product's (time, chan) plane.

    Parameters
    ----------
    data : ndarray (time, chan), float or complex
        The product's samples as stored (power for an auto, visibility for a cross).
    inr : ndarray (time, chan)
        INR to add per sample (0 = untouched).
    rms : ndarray (chan,)
        Noise rms per dump of the value the flagger sees (power, or amplitude).
    auto : bool
        Auto product (power) or cross product (amplitude raised by ``c``, phase kept).
    s2 : ndarray (time, chan), optional
        Sum of squared raw powers; updated as ``S2 + 2 c M P + M c^2``.
    accumulations : int
        M, raw spectra per dump.

    Returns
    -------
    (data, s2): new arrays (the inputs are not changed).
    """
    c = np.asarray(inr, dtype=np.float64) * np.nan_to_num(np.asarray(rms, dtype=np.float64))[np.newaxis, :]
    data = np.array(data, copy=True)
    if auto:
        p = data.real.astype(np.float64)
        if s2 is not None:
            m = float(accumulations)
            s2 = (np.asarray(s2, dtype=np.float64) + 2.0 * c * m * p + m * c * c).astype(np.float32)
        if np.iscomplexobj(data):
            data = data + c.astype(data.real.dtype)
        else:
            data = (p + c).astype(data.dtype)
    else:
        amp = np.abs(data)
        with np.errstate(all="ignore"):
            scale = np.where(amp > 0, (amp + c) / amp, 1.0)
        data = (data * scale).astype(data.dtype)
    return data, s2


def copy_scan(src_path, dst_path, layout=None, max_dumps=None, injections=None, seed=0,
              levels=(1.0, 2.0, 5.0), fraction=0.01):
    """Write a copy of (the first ``max_dumps`` dumps of) a scan, optionally with interference.

    The source is read through :func:`rfisieve.io.scan.open_scan` (read-only, any layout the
    run config describes) and written in the standard layout.  With ``injections`` set
    to ``True`` a random set is planned with :func:`plan_injections` (``seed``,
    ``levels``, ``fraction``); a list is used as given; None copies the data unchanged.

    Returns
    -------
    dict(inr, kind, kinds, dropped, injections): the truth of the injected
    interference, planes (time, chan, prod) (all zero for a plain copy).
    """
    import h5py

    from rfisieve.io.scan import open_scan
    from rfisieve.detect.masks import amplitude, invalid_mask

    with open_scan(src_path, layout) as scan:
        n = scan.ntime if not max_dumps else min(scan.ntime, int(max_dumps))
        block = scan.read(0, n)
        attrs = {k: v for k, v in scan.attrs.items()}
        time, freq, products, autos = scan.time[:n], scan.freq, list(scan.products), scan.autos
        accumulations = scan.accumulations
    data = block["data"]
    s2 = block.get("s2")
    nchan, nprod = data.shape[1], data.shape[2]
    inr = np.zeros(data.shape, dtype=np.float32)
    kind = np.zeros(data.shape, dtype=np.uint8)
    if injections is True:
        injections = plan_injections(n, nchan, np.random.default_rng(seed), levels, fraction)
    if injections:
        plane_inr, plane_kind = truth_planes((n, nchan), injections)
        data = np.array(data, copy=True)
        s2 = None if s2 is None else np.array(s2, copy=True)
        for p in range(nprod):
            vals = amplitude(data[:, :, p], autos[p])
            bad = invalid_mask(vals, autos[p])
            if "flags" in block:
                bad = bad | block["flags"][:, :, p]
            rms = robust_rms(vals, bad)
            hit = plane_inr * ~bad
            new, new_s2 = add_interference(data[:, :, p], hit, rms, autos[p],
                                           None if (s2 is None or not autos[p]) else s2[:, :, p], accumulations)
            data[:, :, p] = new
            if new_s2 is not None:
                s2[:, :, p] = new_s2
            inr[:, :, p] = hit
            kind[:, :, p] = np.where(hit > 0, plane_kind, 0)
    with h5py.File(dst_path, "w") as f:
        f.create_dataset("data", data=data, chunks=(min(n, 256), nchan, nprod))
        f["time"] = time
        f["freq"] = freq
        f["products"] = np.array(products, dtype=object)
        if "flags" in block:
            f["flags"] = block["flags"].astype(np.uint8)
        if s2 is not None:
            f["s2"] = s2
        for k, v in attrs.items():
            f.attrs[k] = v
    return {"inr": inr, "kind": kind, "kinds": dict(KINDS), "dropped": np.zeros(n, dtype=bool),
            "injections": list(injections or [])}


__all__ = ["KINDS", "robust_rms", "plan_injections", "truth_planes", "add_interference", "copy_scan"]
