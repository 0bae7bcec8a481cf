"""Occupancy counts of masks: pure counting functions of mask arrays and one chunked
read of a mask file (:func:`count_mask_file`).

Counting rules
--------------
* A *sample* is one (dump, channel, product) cell of the mask.
* ``flagged`` counts a sample once when any bit is set, however many causes it has.
* The cause column of bit ``b`` counts every sample with bit ``b`` set, so a sample
  with two causes counts once in ``flagged`` and once in each of its two cause columns
  (cause columns can add up to more than ``flagged``).
* The *primary* cause of a flagged sample is its lowest set bit (bit-table order:
  upstream, invalid, known, sk, sumthreshold, grown, cut).  Primary counts do
  add up to ``flagged`` exactly; the review's stacked plots use them.

The file formats written from these counts are described in :mod:`rfisieve.review.tables`.
"""

import functools
import os

import numpy as np

from rfisieve import bits as _bits
from rfisieve.errors import ScanError
from rfisieve.io.hdf5 import attr_str as _attr_str
from rfisieve.io.hdf5 import strings as _strings


BIT_NAMES = tuple(_bits.NAMES)


BIT_VALUES = tuple(row[1] for row in _bits.BIT_TABLE)


NBITS = len(BIT_VALUES)


#: Default largest image size (time bins x channel bins).
IMAGE_BINS = (512, 512)


#: Default memory budget for one chunk of mask read from disk, bytes.
CHUNK_BYTES = 32 * 2**20


def bin_starts(n, nbins):
    """First index of each of ``min(n, nbins)`` near-equal bins over ``n`` items, plus ``n``.

    Item ``i`` falls in bin ``i * nb // n`` (``nb`` = number of bins).
    """
    nb = max(1, min(int(n), int(nbins)))
    idx = np.arange(nb + 1, dtype=np.int64)
    # smallest i with i * nb // n >= k  <=>  i >= ceil(k * n / nb)
    return -((-idx * int(n)) // nb)


@functools.lru_cache(maxsize=None)
def _value_tables():
    # on first use: the kernels' module imports numba, which the review never needs
    from rfisieve.review._count_kernels import value_tables

    return value_tables(BIT_VALUES)


def chunk_counts(flags, time_bin=None, chan_starts=None, ntbin=None):
    """Occupancy counts of one block of a mask.

    Parameters
    ----------
    flags : ndarray of uint8, shape (ntime, nchan, nprod)
        Mask values, one bit per cause (:data:`rfisieve.bits.BIT_TABLE`).
    time_bin : ndarray of int, shape (ntime,), optional
        Image time bin of each dump of the block.
    chan_starts : ndarray of int, shape (ncbin + 1,), optional
        First channel of each image channel bin (:func:`bin_starts`).
    ntbin : int, optional
        Number of image time bins.

    Returns
    -------
    dict
        ``channel_flagged`` (nchan,), ``channel_bits`` (nbits, nchan),
        ``channel_primary`` (nbits, nchan), ``product_channel_flagged`` (nprod, nchan),
        ``dump_flagged`` (ntime,), ``dump_bits`` (nbits, ntime), ``product_flagged``
        (nprod,), ``product_bits`` (nbits, nprod) and, when the image bins are given,
        ``image_flagged`` (ntbin, ncbin); all int64 counts of samples, following the
        counting rules of the module docstring.

    Notes
    -----
    One compiled pass over the block (:mod:`rfisieve.review._count_kernels`): the
    per-bit and primary counts come from per-channel, per-dump and per-product
    histograms of the 256 mask values.
    """
    from rfisieve.review._count_kernels import count_block

    flags = np.asarray(flags)
    if flags.ndim != 3:
        raise ValueError(f"mask block must be 3-d (time, chan, prod), got shape {flags.shape}")
    flags = np.ascontiguousarray(flags, dtype=np.uint8)
    nt, nc, npr = flags.shape
    image = chan_starts is not None and time_bin is not None
    if image:
        tbin = np.ascontiguousarray(time_bin, dtype=np.int64)
        cbin = np.repeat(np.arange(len(chan_starts) - 1, dtype=np.int64), np.diff(chan_starts))
        img = np.zeros((int(ntbin), len(chan_starts) - 1), np.int64)
    else:
        tbin, cbin, img = np.zeros(nt, np.int64), np.zeros(nc, np.int64), np.zeros((1, 1), np.int64)
    z = np.zeros
    ch_any, pc_any, dump_any, prod_any = z(nc, np.int64), z((npr, nc), np.int64), z(nt, np.int64), z(npr, np.int64)
    hist_c, hist_t, hist_p = z((nc, 256), np.int64), z((nt, 256), np.int64), z((npr, 256), np.int64)
    count_block(flags, tbin, cbin, ch_any, pc_any, dump_any, prod_any, hist_c, hist_t, hist_p, img)
    has_bit, primary = _value_tables()
    out = {
        "channel_flagged": ch_any,
        "product_channel_flagged": pc_any,
        "dump_flagged": dump_any,
        "product_flagged": prod_any,
        # exact: integer products of counts with 0/1 tables
        "channel_bits": (hist_c @ has_bit).T.copy(),
        "channel_primary": (hist_c @ primary).T.copy(),
        "dump_bits": (hist_t @ has_bit).T.copy(),
        "product_bits": (hist_p @ has_bit).T.copy(),
    }
    if image:
        out["image_flagged"] = img
    return out


class ScanOccupancy:
    """Accumulates :func:`chunk_counts` over the dumps of one scan.

    Parameters
    ----------
    ntime, nchan, nprod : int
        Shape of the scan's mask.
    image_bins : (int, int)
        Largest number of time and channel bins of the occupancy image.
    """

    def __init__(self, ntime, nchan, nprod, image_bins=IMAGE_BINS):
        self.ntime, self.nchan, self.nprod = int(ntime), int(nchan), int(nprod)
        self.time_start = bin_starts(self.ntime, image_bins[0])
        self.chan_start = bin_starts(self.nchan, image_bins[1])
        self._tbin = np.repeat(np.arange(len(self.time_start) - 1), np.diff(self.time_start))
        ntb, ncb = len(self.time_start) - 1, len(self.chan_start) - 1
        z = np.zeros
        self.c = {
            "channel_flagged": z(self.nchan, np.int64),
            "channel_bits": z((NBITS, self.nchan), np.int64),
            "channel_primary": z((NBITS, self.nchan), np.int64),
            "product_channel_flagged": z((self.nprod, self.nchan), np.int64),
            "dump_flagged": z(self.ntime, np.int64),
            "dump_bits": z((NBITS, self.ntime), np.int64),
            "product_flagged": z(self.nprod, np.int64),
            "product_bits": z((NBITS, self.nprod), np.int64),
            "image_flagged": z((ntb, ncb), np.int64),
        }
        self.dumps_seen = 0

    def add(self, start, block):
        """Add the counts of mask ``block`` holding dumps ``start .. start + len(block)``."""
        block = np.asarray(block)
        stop = start + block.shape[0]
        if block.shape[1:] != (self.nchan, self.nprod) or start < 0 or stop > self.ntime:
            raise ValueError(f"block of shape {block.shape} at dump {start} does not fit the "
                             f"scan shape {(self.ntime, self.nchan, self.nprod)}")
        cc = chunk_counts(block, self._tbin[start:stop], self.chan_start, len(self.time_start) - 1)
        c = self.c
        for key in ("channel_flagged", "channel_bits", "channel_primary",
                    "product_channel_flagged", "product_flagged", "product_bits",
                    "image_flagged"):
            c[key] += cc[key]
        c["dump_flagged"][start:stop] += cc["dump_flagged"]
        c["dump_bits"][:, start:stop] += cc["dump_bits"]
        self.dumps_seen += block.shape[0]

    def result(self):
        """All counts as a dict of arrays (the datasets of the per-scan HDF5 file)."""
        c = self.c
        nt, nc, npr = self.ntime, self.nchan, self.nprod
        ts, cs = self.time_start, self.chan_start
        return {
            "channel/samples": np.full(nc, nt * npr, np.int64),
            "channel/flagged": c["channel_flagged"],
            "channel/bits": c["channel_bits"],
            "channel/primary": c["channel_primary"],
            "channel/product_flagged": c["product_channel_flagged"],
            "dump/samples": np.full(nt, nc * npr, np.int64),
            "dump/flagged": c["dump_flagged"],
            "dump/bits": c["dump_bits"],
            "product/samples": np.full(npr, nt * nc, np.int64),
            "product/flagged": c["product_flagged"],
            "product/bits": c["product_bits"],
            "image/samples": np.outer(np.diff(ts), np.diff(cs)).astype(np.int64) * npr,
            "image/flagged": c["image_flagged"],
            "image/time_start": ts,
            "image/chan_start": cs,
        }


def mask_counts(flags, image_bins=IMAGE_BINS):
    """Occupancy counts of a whole in-memory mask ``(ntime, nchan, nprod)`` (see :class:`ScanOccupancy`)."""
    flags = np.asarray(flags)
    acc = ScanOccupancy(*flags.shape, image_bins=image_bins)
    acc.add(0, flags)
    return acc.result()


def fraction(num, den):
    """``num / den`` elementwise, NaN where ``den`` is 0."""
    num = np.asarray(num, float)
    den = np.asarray(den, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1), np.nan)


def freq_key(freq_hz):
    """Integer key of channel centre frequencies: Hz rounded to 1 Hz (exact-match grid)."""
    return np.round(np.asarray(freq_hz, float)).astype(np.int64)


def aggregate_band(scans):
    """Sum per-scan channel counts of one band onto the union of their channel grids.

    Parameters
    ----------
    scans : list of dict
        Each with ``freq`` (Hz), ``products`` (list of str) and the per-scan count
        arrays ``channel/samples``, ``channel/flagged``, ``channel/bits``,
        ``channel/primary``, ``channel/product_flagged`` and ``ntime``.

    Returns
    -------
    dict
        ``freq`` (sorted union, Hz), ``scans``, ``samples``, ``flagged`` (nchan,),
        ``bits``, ``primary`` (nbits, nchan), ``products`` (union, sorted by first
        appearance), ``product_samples`` and ``product_flagged`` (nprod, nchan).
        Channels match by exact centre frequency (:func:`freq_key`).
    """
    keys = np.unique(np.concatenate([freq_key(s["freq"]) for s in scans])) if scans else np.zeros(0, np.int64)
    products = []
    for s in scans:
        for p in s["products"]:
            if p not in products:
                products.append(p)
    nc, npr = len(keys), len(products)
    out = {
        "freq": np.zeros(nc),
        "scans": np.zeros(nc, np.int64),
        "samples": np.zeros(nc, np.int64),
        "flagged": np.zeros(nc, np.int64),
        "bits": np.zeros((NBITS, nc), np.int64),
        "primary": np.zeros((NBITS, nc), np.int64),
        "products": products,
        "product_samples": np.zeros((npr, nc), np.int64),
        "product_flagged": np.zeros((npr, nc), np.int64),
    }
    fsum = np.zeros(nc)
    for s in scans:
        k = freq_key(s["freq"])
        if len(np.unique(k)) != len(k):
            raise ValueError(f"scan {s.get('scan', '?')}: two channels share a centre frequency")
        idx = np.searchsorted(keys, k)
        out["scans"][idx] += 1
        fsum[idx] += np.asarray(s["freq"], float)
        out["samples"][idx] += s["channel/samples"]
        out["flagged"][idx] += s["channel/flagged"]
        out["bits"][:, idx] += s["channel/bits"]
        out["primary"][:, idx] += s["channel/primary"]
        for j, p in enumerate(s["products"]):
            pi = products.index(p)
            out["product_samples"][pi, idx] += int(s["ntime"])
            out["product_flagged"][pi, idx] += s["channel/product_flagged"][j]
    out["freq"] = fsum / np.maximum(out["scans"], 1)
    return out


def occupied_ranges(freq_hz, flagged, samples, threshold=0.25, primary=None):
    """Contiguous runs of channels whose flagged fraction is at least ``threshold``.

    Parameters
    ----------
    freq_hz : ndarray (nchan,)
        Channel centres, sorted ascending.
    flagged, samples : ndarray (nchan,)
        Flagged and total sample counts per channel.
    threshold : float
        Fraction at or above which a channel belongs to a range.
    primary : ndarray (nbits, nchan), optional
        Primary-cause counts, to name the main cause of each range.

    Returns
    -------
    list of dict
        ``first``, ``last`` (channel indices), ``channels``, ``start_mhz``,
        ``stop_mhz`` (outer channel edges: half the neighbour spacing beyond the
        outer centres), ``mean_fraction`` (flagged / samples over the range),
        ``peak_fraction``, ``flagged`` (samples), ``cause`` (main primary cause);
        sorted by flagged samples, largest first.
    """
    f = np.asarray(freq_hz, float)
    frac = fraction(flagged, samples)
    hot = np.nan_to_num(frac, nan=0.0) >= threshold
    n = len(f)
    if n == 0:
        return []
    half = np.zeros(n)
    if n > 1:
        d = np.diff(f)
        half = 0.5 * np.minimum(np.concatenate([[d[0]], d]), np.concatenate([d, [d[-1]]]))
    out = []
    edges = np.flatnonzero(np.diff(np.concatenate([[0], hot.astype(np.int8), [0]])))
    for a, b in zip(edges[::2], edges[1::2]):
        last = b - 1
        fl = int(np.sum(flagged[a:b]))
        sm = int(np.sum(samples[a:b]))
        row = {
            "first": int(a), "last": int(last), "channels": int(b - a),
            "start_mhz": (f[a] - half[a]) / 1e6, "stop_mhz": (f[last] + half[last]) / 1e6,
            "mean_fraction": fl / sm if sm else float("nan"),
            "peak_fraction": float(np.nanmax(frac[a:b])), "flagged": fl, "cause": "",
        }
        if primary is not None:
            row["cause"] = BIT_NAMES[int(np.argmax(np.asarray(primary)[:, a:b].sum(axis=1)))]
        out.append(row)
    out.sort(key=lambda r: -r["flagged"])
    return out


def count_mask_file(path, chunk_dumps=None, image_bins=IMAGE_BINS, progress=None, counted=None):
    """Read mask file ``path`` in chunks of dumps and return its occupancy counts.

    Returns
    -------
    dict
        The arrays of :meth:`ScanOccupancy.result` plus ``freq``, ``time``,
        ``products`` and ``attrs`` (``scan``, ``band``, ``ntime``, ``nchan``, ``nprod``,
        ``integration_time``, ``hours``, ``start_time``, ``stop_time``) and ``sk``
        (the /diagnostics/sk group as dict, or None).

    Raises
    ------
    ScanError
        When the file is missing or is not a mask file of docs/design.md 3.2.
    """
    import h5py

    path = str(path)
    if not os.path.isfile(path):
        raise ScanError(path, "mask file not found")
    try:
        fh = h5py.File(path, "r")
    except OSError as err:
        raise ScanError(path, f"cannot open as HDF5 ({err.__class__.__name__})") from None
    with fh:
        for name in ("flags", "freq", "time", "products"):
            if name not in fh:
                raise ScanError(path, f"no /{name} dataset: not a mask file")
        ds = fh["flags"]
        if ds.ndim != 3 or ds.dtype != np.uint8:
            raise ScanError(path, f"/flags must be uint8 (time, chan, prod), got {ds.dtype} {ds.shape}")
        nt, nc, npr = ds.shape
        freq = np.asarray(fh["freq"][()], float)
        time = np.asarray(fh["time"][()], float)
        products = _strings(fh["products"])
        if freq.shape != (nc,) or time.shape != (nt,) or len(products) != npr:
            raise ScanError(path, f"/time, /freq or /products do not match /flags shape {ds.shape}")
        if "band" not in fh.attrs:
            raise ScanError(path, "no 'band' attribute")
        band = _attr_str(fh.attrs["band"])
        if chunk_dumps is None:
            per_dump = max(1, nc * npr)
            chunk_dumps = max(1, CHUNK_BYTES // per_dump)
            if ds.chunks:
                ct = ds.chunks[0]
                chunk_dumps = max(ct, (chunk_dumps // ct) * ct)
        chunk_dumps = int(chunk_dumps)
        acc = counted
        if acc is None or (acc.ntime, acc.nchan, acc.nprod) != (nt, nc, npr) or acc.dumps_seen != nt:
            acc = ScanOccupancy(nt, nc, npr, image_bins=image_bins)
            for start in range(0, nt, chunk_dumps):
                stop = min(nt, start + chunk_dumps)
                acc.add(start, ds[start:stop])
            if progress:
                progress(stop, nt)
        dt = None
        for key in ("integration_time", "dump_time"):
            if key in fh.attrs:
                try:
                    dt = float(fh.attrs[key])
                except (TypeError, ValueError):
                    dt = None
                break
        if dt is None:
            dt = float(np.median(np.diff(time))) if nt > 1 else 0.0
        sk = None
        if "diagnostics/sk" in fh:
            g = fh["diagnostics/sk"]
            sk = {k: np.asarray(g[k][()]) for k in g.keys() if isinstance(g[k], h5py.Dataset)}
            sk["attrs"] = {k: (v.item() if isinstance(v, np.ndarray) and v.shape == () else
                               (_attr_str(v) if isinstance(v, bytes) else v))
                           for k, v in g.attrs.items()}
    out = acc.result()
    out.update(freq=freq, time=time, products=products, sk=sk)
    out["attrs"] = {
        "scan": os.path.basename(path)[:-3] if path.endswith(".h5") else os.path.basename(path),
        "band": band, "mask": os.path.abspath(path), "ntime": nt, "nchan": nc, "nprod": npr,
        "integration_time": dt, "hours": nt * dt / 3600.0,
        "start_time": float(time[0]) if nt else float("nan"),
        "stop_time": float(time[-1]) if nt else float("nan"),
    }
    return out
