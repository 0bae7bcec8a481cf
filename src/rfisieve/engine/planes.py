"""Per-plane work: what one dask task does to one (chunk x product) plane, or to the
two auto products of one antenna's feed pair (:func:`feed_groups`).

Each function here takes numpy planes and returns numpy planes; the detectors it calls
are pure functions from :mod:`rfisieve.detect`.
"""

import numpy as np

from rfisieve import bits
from rfisieve.detect.masks import amplitude, invalid_mask, static_channels
from rfisieve.engine.plan import _sumthreshold_settings


DETECTORS = ("sk", "sumthreshold")


#: Bin edges of the SK histogram when SK is off (the review's kurtosis diagnostic; with SK
#: on, the edges follow the thresholds: :func:`sk_histogram_edges`).
SK_EDGES = np.linspace(0.0, 3.0, 301)

#: SK histogram: bins between the two thresholds, and most uniform bins; beyond them a
#: geometric tail of bins SK_TAIL_RATIO times wider each up to SK's bound.
SK_BINS_BETWEEN = 100
SK_MAX_BINS = 8192
SK_TAIL_RATIO = 1.1


def sk_histogram_edges(lower, upper, m, n=1, d=1.0):
    """Edges of the SK histogram kept for the review, from 0 past both thresholds to the
    largest value SK can take.

    SK lies in [0, M N d + 1] (S2 / S1^2 lies in [1/M, 1]; docs/design.md 4).  Uniform
    bins (upper - lower) / 100 wide reach that bound unless that takes more than
    :data:`SK_MAX_BINS` bins, and always reach a quarter of the thresholds' distance past
    the upper one; beyond them, when the bound is further, bins each
    :data:`SK_TAIL_RATIO` times the last edge (10 % wide: a log-spaced tail) reach it,
    so strong interference (SK in the hundreds) still falls in a bin of the histogram.
    One more bin follows: a larger value (rounding only) is clipped into it, so the
    review would know how many values lie beyond the histogram's range.
    """
    w = (float(upper) - float(lower)) / SK_BINS_BETWEEN
    bound = m * n * d + 1.0
    nb = int(min(np.ceil(bound / w), SK_MAX_BINS))
    nb = max(nb, int(np.ceil(float(upper) / w)) + SK_BINS_BETWEEN // 4)
    edges = np.linspace(0.0, nb * w, nb + 1)
    if edges[-1] < bound:
        ntail = int(np.ceil(np.log(bound / edges[-1]) / np.log(SK_TAIL_RATIO)))
        edges = np.concatenate([edges, edges[-1] * SK_TAIL_RATIO ** np.arange(1, ntail + 1)])
    return np.append(edges, edges[-1] + (edges[-1] - edges[-2]))


def _sk_edges(meta):
    """The SK histogram edges of a scan (``meta`` of :func:`_meta`)."""
    return meta["sk"]["edges"] if "sk" in meta else SK_EDGES


def _st_settings(band):
    """The flagger's keyword settings of a band (``combine_feeds`` is the engine's)."""
    st = _sumthreshold_settings(band)
    st.pop("combine_feeds", None)
    return st


def _antenna_feed(product):
    """(antenna, feed) of an auto product ``<antenna>.<feed>-<antenna>.<feed>``, or None
    when the product is not an auto product of an input named that way."""
    parts = str(product).split("-")
    if len(parts) != 2 or parts[0] != parts[1]:
        return None
    ant, dot, feed = parts[0].rpartition(".")
    return (ant, feed) if dot and ant and feed else None


def feed_groups(products, combine=True):
    """The products flagged together: tuples of product indices, in product order.

    Rule (docs/design.md 5): inputs are named ``<antenna>.<feed>`` (``pier3.a``); the
    name before the last dot is the antenna.  The auto products of an antenna form one
    group when there are exactly two of them, with different feeds (both
    polarizations of one feed pair); everything else is flagged alone: cross products,
    autos of inputs without a dot, and an antenna with one auto product or more than
    two (the pairing is then unclear).  ``combine`` False gives every product alone.
    """
    names = [str(p) for p in products]
    alone = [(p,) for p in range(len(names))]
    if not combine:
        return alone
    by_ant = {}
    for p, name in enumerate(names):
        af = _antenna_feed(name)
        if af is not None:
            by_ant.setdefault(af[0], []).append((p, af[1]))
    pair_of = {}
    for members in by_ant.values():
        if len(members) == 2 and members[0][1] != members[1][1]:
            g = (members[0][0], members[1][0])
            pair_of[g[0]] = pair_of[g[1]] = g
    groups, seen = [], set()
    for p in range(len(names)):
        g = pair_of.get(p, (p,))
        if g not in seen:
            seen.add(g)
            groups.append(g)
    return groups


def _meta(scan, band):
    k = band["kurtosis"]
    meta = {
        "path": str(scan.path),
        "layout": scan.layout,
        "nchan": scan.nchan,
        "nprod": scan.nprod,
        "autos": [bool(a) for a in scan.autos],
        # products flagged together: the two auto products of a feed pair (band key
        # sumthreshold.combine_feeds), every other product alone
        "groups": feed_groups(scan.products, bool(band["sumthreshold"].get("combine_feeds", False))
                              and band["sumthreshold"]["enabled"]),
        "has_s2": scan.has_s2,
        "accumulations": scan.accumulations,
        "presum": scan.presum,
        "d": scan.d,
        "static": static_channels(scan.freq, band.get("known_bad")),
        # protected sky lines: the persistence test is off there (band key `protect`)
        "protect": static_channels(scan.freq, band.get("protect")),
    }
    if k["enabled"]:
        from rfisieve.detect.kurtosis import gaussian_tail

        pfa = k["pfa"] if k.get("pfa") is not None else gaussian_tail(k["sigma"])
        if scan.has_s2:
            # Mode (a): SK per dump, M = accumulations, N = presum (docs/design.md 4).
            m, n = scan.accumulations, scan.presum
        else:
            # Mode (b): blocks of M dumps, N = raw spectra per dump.
            m, n = int(k["block_dumps"]), scan.accumulations * scan.presum
        from rfisieve.detect.kurtosis import sk_threshold_table, sk_thresholds

        sk = {"mode": "s2" if scan.has_s2 else "block", "m": m, "n": n, "d": scan.d,
              "pfa": pfa, "method": k["method"]}
        # thresholds computed once here, not in every task (the exact tails cost ~1 s)
        sk["lower"], sk["upper"] = sk_thresholds(m, n, scan.d, pfa=pfa, method=k["method"])
        if not scan.has_s2:
            sk["table"] = sk_threshold_table(m, n, scan.d, pfa=pfa, method=k["method"])
        sk["edges"] = sk_histogram_edges(sk["lower"], sk["upper"], m, n, scan.d)
        meta["sk"] = sk
    return meta


def _planes(block, lo, hi, p):
    """One product's 2-D (time, chan) planes of rows lo:hi of a read block (views)."""
    return {key: arr[lo:hi, :, p] for key, arr in block.items()}


def _noise_task(planes, band, meta, p, t0, sigma=True, shape=False):
    """The pre-pass on one window of one product: (SumThreshold noise sigma, or NaN when
    not asked for; the window's bandpass shape for the scan's reference, or None when
    not asked for: :func:`rfisieve.engine.executor._noise_prepass` asks for it only with
    the persistence test on)."""
    from rfisieve.detect.sumthreshold import sumthreshold_noise

    prep = _prepare(planes, p, meta)
    if prep["excluded"].all():
        return np.nan, None
    sig = (float(sumthreshold_noise(prep["values"], invalid=prep["excluded"], t0=t0, **_st_settings(band)))
           if sigma else np.nan)
    out = None
    if shape:
        from rfisieve.detect.bandpass import reference_shape

        out = reference_shape(prep["values"], prep["excluded"])
    return sig, out


def _reference(meta, p):
    """Product p's reference bandpass shape of the pre-pass (None without one)."""
    refs = meta.get("ref")
    return None if refs is None else refs[p]


def _s2_invalid(s2):
    """Samples whose recorded S2 no statistic may use: NaN, Inf, zero or negative."""
    return ~np.isfinite(s2) | (s2 <= 0)


def _prior(planes, meta, values, auto):
    """(invalid, excluded): samples no statistic may use, and those plus input/static flags."""
    invalid = invalid_mask(values, auto)
    if "s2" in planes and auto:
        invalid |= _s2_invalid(planes["s2"])
    excluded = invalid | meta["static"][np.newaxis, :]
    if "flags" in planes:
        excluded |= planes["flags"]
    return invalid, excluded


_KERNEL_DTYPES = tuple(np.dtype(t) for t in ("float32", "float64", "complex64", "complex128"))


def _prepare(planes, p, meta):
    """What both detectors need of one (chunk x product) plane, computed once.

    The one-pass kernel gives what :func:`_prior` gives (tests/test_engine.py checks it).
    """
    from rfisieve.detect._masks_kernels import prepare_plane

    auto = bool(meta["autos"][p])
    data = planes["data"]
    if data.dtype not in _KERNEL_DTYPES or (data.dtype.kind == "c" and not auto):
        # float16, or |V| of cross products (numba's complex abs differs from numpy's
        # hypotf in the last bit): the numpy definition
        values = amplitude(data, auto)
        invalid, excluded = _prior(planes, meta, values, auto)
        return {"values": values, "invalid": invalid, "excluded": excluded, "s2": planes.get("s2")}
    shape = data.shape
    values = np.empty(shape, np.float32)
    invalid = np.empty(shape, np.bool_)
    excluded = np.empty(shape, np.bool_)
    flags = planes.get("flags")
    prepare_plane(data, auto, np.ascontiguousarray(meta["static"], dtype=np.bool_),
                  np.zeros((1, 1), np.bool_) if flags is None else np.asarray(flags, dtype=np.bool_),
                  flags is not None, values, invalid, excluded)
    if "s2" in planes and auto:
        bad = _s2_invalid(planes["s2"])
        invalid |= bad
        excluded |= bad
    return {"values": values, "invalid": invalid, "excluded": excluded, "s2": planes.get("s2")}


def _detect_product(prep, p, detector, band, meta, t0, core, rows=None, hit=None):
    """One detector on one (chunk x product) plane with halo rows from dump ``t0``.

    ``prep`` is :func:`_prepare`'s result.  Returns (uint8 (rows, chan) with that
    detector's bit and the invalid bit, SK histogram counts of the core rows or None);
    ``rows`` (default ``core``) are the plane rows returned.  ``hit``: SumThreshold's
    detections of this product already found (by the feed pair's combined detection,
    :func:`_sumthreshold_hits`).
    """
    r = slice(*(core if rows is None else rows))
    values, invalid, excluded = prep["values"], prep["invalid"], prep["excluded"]
    out = _bit(invalid[r], bits.INVALID)
    hist = None
    if detector == "sumthreshold" and band["sumthreshold"]["enabled"]:
        if hit is None:
            hit = _sumthreshold_hits([prep], (p,), band, meta, t0, core if rows is None else rows)[0]
        out |= _bit(hit[r] & ~excluded[r], bits.SUMTHRESHOLD)
    elif detector == "sk" and meta["autos"][p] and "sk" in meta:
        hit, hist = _kurtosis(prep, values, excluded, meta["sk"], t0, core, wanted=r)
        out |= _bit(hit[r] & ~excluded[r], bits.SK)
    return out, hist


def _bit(mask, value):
    """uint8 plane: ``value`` where the bool plane ``mask`` is True, 0 elsewhere (one
    multiply of its bytes, 0 or 1: no masked scatter)."""
    return np.ascontiguousarray(mask, dtype=np.bool_).view(np.uint8) * np.uint8(value)


def _sumthreshold_hits(preps, group, band, meta, t0, wanted):
    """SumThreshold's detections of each product of ``group``: alone, or for a feed pair
    by :func:`rfisieve.detect.sumthreshold.combined_flagger` (each product's own
    detections, or'ed with those on the pair's summed normalised residuals).  Only the
    rows ``wanted`` are exact (the flagger skips what they do not depend on)."""
    from rfisieve.detect.sumthreshold import combined_flagger, sumthreshold_flagger

    st = _st_settings(band)
    if len(group) == 1:
        prep = preps[0]
        return [sumthreshold_flagger(prep["values"], invalid=prep["excluded"], sigma=meta["sigma"][group[0]],
                                     t0=t0, protect=meta.get("protect"), wanted=wanted,
                                     reference=_reference(meta, group[0]), **st)]
    return combined_flagger([pr["values"] for pr in preps], [meta["sigma"][p] for p in group],
                            invalids=[pr["excluded"] for pr in preps], t0=t0, protect=meta.get("protect"),
                            wanted=wanted, references=[_reference(meta, p) for p in group], **st)


def _detect_group(preps, group, detector, band, meta, t0, core, rows=None):
    """:func:`_detect_product` on each product of ``group`` (a feed pair's SumThreshold
    detections found together); a list of its results in the group's order."""
    hits = [None] * len(group)
    if detector == "sumthreshold" and band["sumthreshold"]["enabled"]:
        hits = _sumthreshold_hits(preps, group, band, meta, t0, core if rows is None else rows)
    return [_detect_product(prep, p, detector, band, meta, t0, core, rows=rows, hit=h)
            for prep, p, h in zip(preps, group, hits)]


def _kurtosis(prep, values, excluded, sk, t0, core, wanted=None):
    """SK's detections (a plane of the rows of ``values``; exact within ``wanted``, a
    slice, default all) and the SK histogram of the ``core`` rows."""
    from rfisieve.detect.kurtosis import block_halo, sk_block_histogram, sk_estimator, sk_flag_blocks, sk_flag_dumps

    m, n, d, edges = sk["m"], sk["n"], sk["d"], sk["edges"]
    valid = ~excluded
    if sk["mode"] == "s2":
        s2 = prep["s2"]
        hit = sk_flag_dumps(values, s2, m, n, d, sk["lower"], sk["upper"], valid)
        rows = slice(core[0], core[1])
        with np.errstate(all="ignore"):
            ski = sk_estimator(values[rows].astype(np.float64) * m, s2[rows].astype(np.float64), m, n, d)
        ski = ski[valid[rows]]
        counts, _ = np.histogram(np.clip(ski[np.isfinite(ski)], edges[0], edges[-1] - 1e-9), edges)
        return hit, counts.astype(np.int64)
    # the blocks reach M - 1 dumps (block_halo): the rows beyond that of the wanted ones
    # only served SumThreshold's bandpass, so SK skips them
    nt = values.shape[0]
    a, b = (0, nt) if wanted is None else (max(0, wanted.start - block_halo(m)),
                                           min(nt, wanted.stop + block_halo(m)))
    hit = np.zeros(values.shape, np.bool_)
    hit[a:b] = sk_flag_blocks(values[a:b], valid[a:b], m, n, d, thresholds=sk["table"], t0=t0 + a)
    return hit, sk_block_histogram(values, valid, m, n, d, edges, t0=t0, rows=core)


def _flag_group(planes, group, band, meta, t0, core, grow):
    """Both detectors, SIR growth and the dump cut on the (chunk x product) planes of
    one group of products (:func:`feed_groups`: a feed pair, or one product alone).

    The single-pass form of :func:`detect` + :func:`merge` (used by :func:`flag_scan`):
    the planes carry the detection halo plus ``grow`` (the merge halo) rows on each
    side, so the detections of the core rows +- ``grow`` are exact and the merge of
    :func:`_merge_plane` sees exactly what it sees in the staged path.  Returns, per
    product of the group, (final uint8 (core rows, chan), SK histogram counts of the
    core rows or None).
    """
    preps = [_prepare(pl, p, meta) for pl, p in zip(planes, group)]
    n = preps[0]["values"].shape[0]
    lo, hi = max(0, core[0] - grow), min(n, core[1] + grow)
    dets = [None] * len(group)
    hists = [None] * len(group)
    for detector in DETECTORS:
        for i, (out, h) in enumerate(_detect_group(preps, group, detector, band, meta, t0, core, rows=(lo, hi))):
            dets[i] = out if dets[i] is None else dets[i] | out
            hists[i] = h if h is not None else hists[i]
    results = []
    for pl, det, hist in zip(planes, dets, hists):
        flags = pl.get("flags")
        extra = _extra_bits(det.shape, None if flags is None else flags[lo:hi], meta["static"])
        results.append((_merge_plane(det, extra, band, (core[0] - lo, core[1] - lo)), hist))
    return results


def _assemble_groups(per_group, groups, nprod):
    """:func:`_assemble` of the groups' results (lists in each group's order)."""
    parts = [None] * nprod
    for group, res in zip(groups, per_group):
        for p, part in zip(group, res):
            parts[p] = part
    return _assemble(parts, nprod)


def _assemble(parts, nprod):
    outs = [pt[0] for pt in parts]
    nbins = next((len(pt[1]) for pt in parts if pt[1] is not None), None)
    if nbins is None:   # no SK histogram in this chunk (SK off, or no auto product)
        return np.stack(outs, axis=-1), None
    hist = np.zeros((nprod, nbins), dtype=np.int64)
    for p, pt in enumerate(parts):
        if pt[1] is not None:
            hist[p] += pt[1]
    return np.stack(outs, axis=-1), hist


def _merge_plane(det, extra, band, core):
    """Merge one product's plane of a chunk (with SIR halo rows) into its final bits.

    ``det`` holds the partial masks' bits OR-ed, ``extra`` the upstream and known bits;
    returns the uint8 (core rows, chan) plane with growth (bit 5) and dump cuts (bit 6).
    """
    from rfisieve.detect._masks_kernels import merge_bits
    from rfisieve.detect.growth import sir_grow

    g = band["growth"]
    det = np.ascontiguousarray(det, dtype=np.uint8)
    extra = np.ascontiguousarray(extra, dtype=np.uint8)
    grown = np.zeros((1, 1), np.bool_)
    use_grown = bool(g["enabled"] and g["eta"] > 0)
    if use_grown:
        grown = sir_grow((det & bits.DETECTED) != 0, g["eta"], time=g["time"], freq=g["freq"],
                         reach_time=g.get("reach_time"), reach_freq=g.get("reach_freq"))
    out = np.empty((core[1] - core[0], det.shape[1]), np.uint8)
    # det | extra, the grown bit where growth adds, and the dump cut (as
    # masks.dump_cut: flagged fraction over channels > limit), whose cut bit
    # marks what the cut adds: the samples no other cause flagged
    merge_bits(det, extra, grown, use_grown, core[0], core[1], bits.DETECTED, bits.GROWN,
               float(band["cuts"]["dump_limit"]), bits.CUT, out)
    return out


def _extra_bits(shape, flags, static):
    """The upstream bit where ``flags`` (or nothing when None) and the known bit on the
    ``static`` channels (axis 1), as uint8 of ``shape`` (time, chan[, prod])."""
    extra = np.zeros(shape, dtype=np.uint8)
    if flags is not None:
        extra[flags] |= bits.UPSTREAM
    extra[:, static] |= bits.KNOWN
    return extra
