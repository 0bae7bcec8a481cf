"""Occupancy tables: the per-scan and per-run CSV and HDF5 files written from the counts
of :mod:`rfisieve.review.counts`.

Per-scan CSV: ``<outdir>/occupancy/<scan>.csv``
-----------------------------------------------
One row per channel, in the mask's channel order.  Columns:

``band``
    the scan's band (mask attribute ``band``).
``first_dump_utc``, ``last_dump_utc``
    the scan's time span: centre of its first and last dump, ISO 8601 UTC
    (``2026-12-01T23:05:01Z``), the same in every row (CSV has no header lines).
``channel``
    channel index in the scan.
``freq_mhz``
    channel centre frequency, MHz.
``samples``
    number of samples in the channel (dumps x products).
``flagged_fraction``
    fraction (0 to 1) of those samples with any bit set.
``<cause>_fraction``
    one column per cause bit (``upstream_fraction``, ``invalid_fraction``, ...,
    ``cut_fraction``; bit names of :data:`rfisieve.bits.BIT_TABLE`): fraction of the
    channel's samples with that cause bit set.
``flagged_fraction_<product>``
    one column per product (e.g. ``flagged_fraction_q01h-q01h``): fraction of that
    product's samples in the channel (= dumps) with any bit set.

Per-run CSV: ``<outdir>/occupancy/run.csv``
-------------------------------------------
One row per band x channel frequency.  Scans of one band may have different channel
grids: channels are matched by their exact centre frequency (rounded to 1 Hz), the
run's grid of a band is the sorted union of the centre frequencies of its scans, and
every count is summed over the scans that have that channel, so each fraction is
weighted by samples.  Columns as in the per-scan CSV, with ``channel`` the index in
the band's run grid and one extra column ``scans`` (number of scans contributing to
the row) after ``freq_mhz`` and no time-span columns; ``flagged_fraction_<product>`` columns cover every product of
the run and are empty where a band's scans lack that product.  Fractions are written
with 10 significant digits.

Per-scan HDF5: ``<outdir>/occupancy/<scan>.h5`` (all counts int64, exact)
------------------------------------------------------------------------
========================  ==================  =========================================
dataset                   shape               meaning
========================  ==================  =========================================
/freq                     (nchan,)            channel centre, Hz
/time                     (ntime,)            dump centre, s since 1970 UTC
/products                 (nprod,)            product names (UTF-8)
/channel/samples          (nchan,)            samples per channel
/channel/flagged          (nchan,)            samples with any bit set
/channel/bits             (nbits, nchan)      samples with bit b set
/channel/primary          (nbits, nchan)      flagged samples whose lowest set bit is b
/channel/product_flagged  (nprod, nchan)      flagged samples per product (of ntime)
/dump/samples             (ntime,)            samples per dump (nchan x nprod)
/dump/flagged             (ntime,)            flagged samples per dump
/dump/bits                (nbits, ntime)      samples with bit b set, per dump
/product/samples          (nprod,)            samples per product (ntime x nchan)
/product/flagged          (nprod,)            flagged samples per product
/product/bits             (nbits, nprod)      samples with bit b set, per product
/image/samples            (ntbin, ncbin)      samples per time x channel bin
/image/flagged            (ntbin, ncbin)      flagged samples per bin
/image/time_start         (ntbin + 1,)        first dump of each time bin (+ ntime)
/image/chan_start         (ncbin + 1,)        first channel of each channel bin (+ nchan)
/image/data               (ntbin, ncbin)      float64: the data image, dB relative to each
                                              channel bin's median over time (written by
                                              the flag job; absent from ``rfisieve
                                              occupancy``'s files)
/diagnostics/sk           group               copied from the mask file when present
========================  ==================  =========================================

Root attributes: ``scan``, ``band``, ``mask`` (path of the mask read), ``ntime``,
``nchan``, ``nprod``, ``bit_names`` (JSON list), ``integration_time`` (s, from the mask
attributes or the median dump spacing), ``hours`` (ntime x integration_time / 3600),
``start_time`` and ``stop_time`` (s since 1970 UTC); with ``/image/data``,
``data_image_note`` (the product shown and the dumps read per time bin).

Per-run HDF5: ``<outdir>/occupancy/run.h5``
-------------------------------------------
``/bands/<band>/`` holds ``freq``, ``scans`` (per channel), ``samples``, ``flagged``,
``bits``, ``primary``, ``products``, ``product_samples`` and ``product_flagged``
(``(nprod, nchan)``) on the band's run grid; ``/scans`` is a table (one row per scan:
``name``, ``band``, ``ntime``, ``nchan``, ``nprod``, ``hours``, ``start_time``,
``stop_time``, ``samples``, ``flagged``, ``bits`` (nscan, nbits)).  Root attributes
``bit_names`` and, written by ``rfisieve review``, ``emitters_json`` (the emitter list
used) and ``range_fraction``.
"""

import csv
import os
import json

import numpy as np

from rfisieve.errors import ScanError
from rfisieve.io.hdf5 import attr_str as _attr_str
from rfisieve.io.hdf5 import strings as _strings
from rfisieve.io.scan import atomic_output
from rfisieve.review.counts import BIT_NAMES, NBITS, aggregate_band, fraction


def _fmt(x):
    if x is None or (isinstance(x, float) and np.isnan(x)):
        return ""
    return f"{x:.10g}"


def fraction_columns(products):
    """Names of the fraction columns: any cause, each cause bit, each product."""
    return ["flagged_fraction", *[f"{b}_fraction" for b in BIT_NAMES], *[f"flagged_fraction_{p}" for p in products]]


def _iso_utc(t):
    import datetime as _dt

    if t is None or not np.isfinite(t):
        return ""
    when = _dt.datetime.fromtimestamp(float(t), tz=_dt.timezone.utc)
    return when.isoformat(timespec="seconds").replace("+00:00", "Z")


def scan_table(counts):
    """Rows (list of lists, with a header row first) of the per-scan CSV for ``counts``."""
    a = counts["attrs"]
    s = counts["channel/samples"]
    time = np.asarray(counts["time"], float)
    span = [_iso_utc(time[0]), _iso_utc(time[-1])] if len(time) else ["", ""]
    head = ["band", "first_dump_utc", "last_dump_utc", "channel", "freq_mhz", "samples",
            *fraction_columns(counts["products"])]
    fl = fraction(counts["channel/flagged"], s)
    bf = fraction(counts["channel/bits"], s[None, :])
    pf = fraction(counts["channel/product_flagged"], np.full(s.shape, a["ntime"])[None, :])
    rows = [head]
    for c in range(len(s)):
        rows.append([a["band"], *span, c, f"{counts['freq'][c] / 1e6:.6f}", int(s[c]), _fmt(fl[c]),
                     *[_fmt(v) for v in bf[:, c]], *[_fmt(v) for v in pf[:, c]]])
    return rows


def run_table(bands):
    """Rows (header first) of run.csv for ``bands`` = {band: :func:`aggregate_band` result}."""
    products = []
    for agg in bands.values():
        for p in agg["products"]:
            if p not in products:
                products.append(p)
    head = ["band", "channel", "freq_mhz", "scans", "samples", *fraction_columns(products)]
    rows = [head]
    for band in sorted(bands):
        agg = bands[band]
        s = agg["samples"]
        fl = fraction(agg["flagged"], s)
        bf = fraction(agg["bits"], s[None, :])
        pf = fraction(agg["product_flagged"], agg["product_samples"])
        for c in range(len(s)):
            prod_cols = []
            for p in products:
                prod_cols.append(_fmt(pf[agg["products"].index(p), c]) if p in agg["products"] else "")
            rows.append([band, c, f"{agg['freq'][c] / 1e6:.6f}", int(agg["scans"][c]), int(s[c]),
                         _fmt(fl[c]), *[_fmt(v) for v in bf[:, c]], *prod_cols])
    return rows


def write_csv(path, rows):
    """Write ``rows`` to CSV ``path`` via a temporary name and a rename."""
    with atomic_output(path) as tmp, open(tmp, "w", newline="") as fh:
        csv.writer(fh).writerows(rows)


def _write_sk(h5, sk):
    if not sk:
        return
    g = h5.create_group("diagnostics/sk")
    for k, v in sk.items():
        if k == "attrs":
            for ak, av in v.items():
                try:
                    g.attrs[ak] = av
                except TypeError:
                    g.attrs[ak] = str(av)
        else:
            g.create_dataset(k, data=v)


def write_scan_h5(path, counts):
    """Write the per-scan occupancy HDF5 (layout in the module docstring) via temp + rename."""
    import h5py

    with atomic_output(path) as tmp, h5py.File(tmp, "w") as h5:
        h5.create_dataset("freq", data=counts["freq"])
        h5.create_dataset("time", data=counts["time"])
        h5.create_dataset("products", data=np.array(counts["products"], dtype=h5py.string_dtype()))
        for key, arr in counts.items():
            if "/" in key:
                # counts compress 100-fold; the data image (float, noise-like) by 4 %, for
                # 18 ms of writing and 7 ms of reading per small scan: it is stored plain
                packed = np.size(arr) > 4096 and np.asarray(arr).dtype.kind in "iub"
                h5.create_dataset(key, data=arr, compression="gzip" if packed else None)
        for k, v in counts["attrs"].items():
            h5.attrs[k] = v
        h5.attrs["bit_names"] = json.dumps(list(BIT_NAMES))
        _write_sk(h5, counts.get("sk"))


def _open_h5(path, missing, required, wrong):
    """Open an occupancy HDF5 file read-only; ScanError with ``missing`` / ``wrong`` otherwise."""
    import h5py

    if not os.path.isfile(path):
        raise ScanError(path, missing)
    try:
        fh = h5py.File(path, "r")
    except OSError as err:
        raise ScanError(path, f"cannot open as HDF5 ({err.__class__.__name__})") from None
    if any(name not in fh for name in required):
        fh.close()
        raise ScanError(path, wrong)
    return fh


def _open_scan_h5(path):
    """A per-scan occupancy file, open read-only (one-line ScanError otherwise)."""
    return _open_h5(path, "occupancy file not found", ("channel", "freq"),
                    "not a per-scan occupancy file (no /channel group)")


#: The (time x channel) images of a per-scan occupancy file: only the scan's own figure
#: draws them, so the review reads them in the process that draws it.
IMAGES = ("image/samples", "image/flagged", "image/data")


def read_scan_h5(path, images=True):
    """Read a per-scan occupancy HDF5 back into the dict of :func:`count_mask_file`;
    without :data:`IMAGES` when ``images`` is false (:func:`read_scan_images` reads them)."""

    path = str(path)
    with _open_scan_h5(path) as fh:
        out = {"freq": fh["freq"][()], "time": fh["time"][()], "products": _strings(fh["products"])}
        for grp in ("channel", "dump", "product", "image"):
            for k in fh[grp]:
                if images or f"{grp}/{k}" not in IMAGES:
                    out[f"{grp}/{k}"] = fh[grp][k][()]
        out["attrs"] = {k: (_attr_str(v) if isinstance(v, (bytes, str)) else
                            (v.item() if isinstance(v, np.generic) else v))
                        for k, v in fh.attrs.items()}
        out["sk"] = None
        if "diagnostics/sk" in fh:
            g = fh["diagnostics/sk"]
            sk = {k: g[k][()] for k in g}
            sk["attrs"] = {k: (_attr_str(v) if isinstance(v, (bytes, str)) else
                               (v.item() if isinstance(v, np.generic) else v))
                           for k, v in g.attrs.items()}
            out["sk"] = sk
    out["attrs"].setdefault("scan", os.path.basename(path)[:-3])
    out["ntime"] = int(out["attrs"]["ntime"])
    return out


def read_scan_images(path):
    """The :data:`IMAGES` of a per-scan occupancy file (those it holds), as in
    :func:`read_scan_h5`."""
    with _open_scan_h5(str(path)) as fh:
        return {k: fh[k][()] for k in IMAGES if k in fh}


def aggregate_run(scans):
    """Aggregate per-scan counts (dicts of :func:`read_scan_h5`) per band: {band: aggregate}."""
    by_band = {}
    for s in scans:
        by_band.setdefault(s["attrs"]["band"], []).append(s)
    return {band: aggregate_band(lst) for band, lst in sorted(by_band.items())}


def scan_overview(scans):
    """One dict per scan: name, band, ntime, nchan, nprod, hours, start/stop time, samples, flagged, bits."""
    rows = []
    for s in scans:
        a = s["attrs"]
        rows.append({
            "name": str(a["scan"]), "band": str(a["band"]), "ntime": int(a["ntime"]),
            "nchan": int(a["nchan"]), "nprod": int(a["nprod"]), "hours": float(a["hours"]),
            "start_time": float(a["start_time"]), "stop_time": float(a["stop_time"]),
            "samples": int(np.sum(s["channel/samples"])), "flagged": int(np.sum(s["channel/flagged"])),
            "bits": np.asarray(s["channel/bits"]).sum(axis=1).astype(np.int64),
        })
    return rows


def write_run_h5(path, bands, overview, attrs=None):
    """Write run.h5 (layout in the module docstring) via temp + rename."""
    import h5py

    sdt = h5py.string_dtype()
    with atomic_output(path) as tmp, h5py.File(tmp, "w") as h5:
        h5.attrs["bit_names"] = json.dumps(list(BIT_NAMES))
        for k, v in (attrs or {}).items():
            h5.attrs[k] = v
        for band, agg in bands.items():
            g = h5.create_group(f"bands/{band}")
            for k, v in agg.items():
                if k == "products":
                    g.create_dataset(k, data=np.array(v, dtype=sdt))
                else:
                    g.create_dataset(k, data=v)
        g = h5.create_group("scans")
        for k in ("name", "band"):
            g.create_dataset(k, data=np.array([r[k] for r in overview], dtype=sdt))
        for k in ("ntime", "nchan", "nprod", "samples", "flagged"):
            g.create_dataset(k, data=np.array([r[k] for r in overview], np.int64))
        for k in ("hours", "start_time", "stop_time"):
            g.create_dataset(k, data=np.array([r[k] for r in overview], float))
        g.create_dataset("bits", data=np.array([r["bits"] for r in overview], np.int64).reshape(-1, NBITS))


def read_run_h5(path):
    """Read run.h5: returns (bands, overview, attrs) as written by :func:`write_run_h5`."""

    path = str(path)
    with _open_h5(path, "run occupancy file not found (run `rfisieve review` first)", ("bands", "scans"),
                  "not a run occupancy file (no /bands or /scans)") as fh:
        bands = {}
        for band in fh["bands"]:
            g = fh["bands"][band]
            agg = {k: g[k][()] for k in g if k != "products"}
            agg["products"] = _strings(g["products"])
            bands[band] = agg
        g = fh["scans"]
        n = len(g["name"])
        names, bnames = _strings(g["name"]), _strings(g["band"])
        overview = []
        for i in range(n):
            row = {"name": names[i], "band": bnames[i], "bits": g["bits"][i]}
            for k in ("ntime", "nchan", "nprod", "samples", "flagged"):
                row[k] = int(g[k][i])
            for k in ("hours", "start_time", "stop_time"):
                row[k] = float(g[k][i])
            overview.append(row)
        attrs = {k: (_attr_str(v) if isinstance(v, (bytes, str)) else v) for k, v in fh.attrs.items()}
    return bands, overview, attrs
