"""What produced the flags, read from files: mask-file attributes, failed scans, scan previews.

The review reads files only (never the engine's internals):

* each mask file (``<outdir>/flags/<scan>.h5``, docs/design.md 3.2) records the package
  version (``rfisieve_version``), the band settings as used (``band_settings``, JSON),
  the band config's path and the input file's identity (``input_identity``, JSON with
  ``path`` and ``size``);
* ``<outdir>/failed_scans.csv`` (columns ``scan,path,stage,reason``) names the scans
  that failed at any stage of the night;
* the data image (a downsampled dynamic spectrum on the time and channel bins of the
  occupancy image) is taken by the flag job while it reads the scan (:class:`DataImage`)
  and stored in the occupancy file; for an occupancy file without one, the scan file
  itself is opened read-only (:func:`data_preview`).

Every reader here degrades to "not known" (``None`` plus a one-line reason) rather than
failing the page: a missing or old mask file must not hide the rest of the night.
"""

import csv
import json
import os

import numpy as np

FAILED_COLUMNS = ("scan", "path", "stage", "reason")

#: Band-settings keys not shown as settings (shown elsewhere on the page, or prose).
NOT_SETTINGS = ("emitters", "description", "band", "protect", "static", "known_bad")


def _attr_text(v):
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray) and v.shape == ():
        return _attr_text(v.item())
    return str(v)


def mask_provenance(mask_path):
    """Attributes of one mask file: dict with ``version``, ``settings`` (dict or None),
    ``band_config_path``, ``input`` (identity dict or None), ``created_utc`` and
    ``problem`` (None, or why the file could not be read)."""
    import h5py

    out = {"version": None, "settings": None, "band_config_path": None, "input": None,
           "created_utc": None, "problem": None}
    if not mask_path or not os.path.isfile(str(mask_path)):
        out["problem"] = f"mask file not found ({mask_path})"
        return out
    try:
        with h5py.File(str(mask_path), "r") as f:
            a = f.attrs
            if "rfisieve_version" in a:
                out["version"] = _attr_text(a["rfisieve_version"])
            if "created_utc" in a:
                out["created_utc"] = _attr_text(a["created_utc"])
            if "band_config_path" in a:
                out["band_config_path"] = _attr_text(a["band_config_path"])
            for key, dest in (("band_settings", "settings"), ("input_identity", "input")):
                if key in a:
                    try:
                        out[dest] = json.loads(_attr_text(a[key]))
                    except ValueError:
                        out["problem"] = f"attribute {key} of {mask_path} is not JSON"
    except OSError as err:
        out["problem"] = f"cannot open {mask_path} ({err.__class__.__name__})"
    return out


def flatten(settings, prefix=""):
    """Nested settings as ``{"a.b": value}`` (lists kept whole, as JSON text)."""
    out = {}
    for k, v in (settings or {}).items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(flatten(v, key + "."))
        else:
            out[key] = v
    return out


def shown_settings(settings):
    """The flattened settings a reviewer compares (prose and emitter lists left out)."""
    return {k: v for k, v in flatten({k: v for k, v in (settings or {}).items()
                                      if k not in NOT_SETTINGS}).items()}


def fmt_value(v):
    """A setting's value as short text (``null`` for None, JSON for lists)."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, (list, dict)):
        return json.dumps(v, sort_keys=True)
    return str(v)


def settings_diff(before, now):
    """Settings that differ: list of ``(key, before text, now text)``, keys sorted.

    A key present on one side only shows ``(absent)`` on the other.
    """
    a, b = shown_settings(before), shown_settings(now)
    out = []
    for k in sorted(set(a) | set(b)):
        va = fmt_value(a[k]) if k in a else "(absent)"
        vb = fmt_value(b[k]) if k in b else "(absent)"
        if va != vb:
            out.append((k, va, vb))
    return out


def band_settings_of(provs):
    """{band: settings} from ``[(band, provenance dict)]``, first scan with settings wins."""
    out = {}
    for band, p in provs:
        if p.get("settings") is not None and band not in out:
            out[band] = p["settings"]
    return out


def previous_settings(previous_csv):
    """Band settings of the run whose ``run.csv`` is ``previous_csv``: (dict or None, where).

    Looks for ``run.h5`` beside it (attribute ``band_settings_json``, written by this
    review) and otherwise for the mask files of that run (``../flags/*.h5``).
    """
    import h5py

    d = os.path.dirname(os.path.abspath(str(previous_csv)))
    h5 = os.path.join(d, "run.h5")
    if os.path.isfile(h5):
        try:
            with h5py.File(h5, "r") as f:
                if "band_settings_json" in f.attrs:
                    return json.loads(_attr_text(f.attrs["band_settings_json"])), h5
        except (OSError, ValueError):
            pass
    flags = os.path.join(os.path.dirname(d), "flags")
    if os.path.isdir(flags):
        provs = []
        for name in sorted(os.listdir(flags)):
            if name.endswith(".h5"):
                p = mask_provenance(os.path.join(flags, name))
                if p["settings"] is not None:
                    provs.append((str(p["settings"].get("band", "")), p))
        if provs:
            return band_settings_of(provs), flags
    return None, None


def read_failed(outdir):
    """Rows of ``<outdir>/failed_scans.csv``: (list of dicts or None, note).

    ``None`` when the file is absent or unreadable, with the note saying so.
    """
    path = os.path.join(str(outdir), "failed_scans.csv")
    if not os.path.isfile(path):
        return None, f"{path} not found: scans that failed before the review are not listed here"
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            head = reader.fieldnames or []
            missing = [c for c in FAILED_COLUMNS if c not in head]
            if missing:
                return None, f"{path} lacks column(s) {', '.join(missing)}"
            rows = []
            for r in reader:
                row = {c: (r.get(c) or "").strip() for c in FAILED_COLUMNS}
                if r.get(None) and head[-1] == "reason":   # an unquoted comma in the last column
                    row["reason"] = ",".join([row["reason"], *r[None]]).strip()
                rows.append(row)
    except (OSError, csv.Error, UnicodeDecodeError) as err:
        return None, f"cannot read {path} ({err.__class__.__name__})"
    return [r for r in rows if any(r.values())], path


def protected_ranges(settings, key="protect"):
    """The band's protected ranges from its settings (key ``protect``), read defensively.

    Also reads the known-bad ranges with ``key="known_bad"``.  Returns a list of dicts
    ``start_mhz``, ``stop_mhz``, ``reason``, ``source``; entries that are not a mapping
    with two numbers are skipped.
    """
    out = []
    entries = (settings or {}).get(key) if isinstance(settings, dict) else None
    if not isinstance(entries, list):
        return out
    for e in entries:
        if not isinstance(e, dict):
            continue
        try:
            a, b = float(e.get("start_mhz")), float(e.get("stop_mhz"))
        except (TypeError, ValueError):
            continue
        if not (np.isfinite(a) and np.isfinite(b)):
            continue
        out.append({"start_mhz": min(a, b), "stop_mhz": max(a, b),
                    "reason": str(e.get("reason") or ""), "source": str(e.get("source") or "")})
    return out


def flagged_inside(freq_hz, flagged, samples, bits_, start_mhz, stop_mhz):
    """Channels with centres in ``[start, stop]`` MHz: (channels, flagged fraction, per-bit fractions)."""
    f = np.asarray(freq_hz, float) / 1e6
    sel = (f >= start_mhz) & (f <= stop_mhz)
    n = int(sel.sum())
    s = float(np.sum(np.asarray(samples)[sel]))
    if not n or s <= 0:
        return n, float("nan"), None
    return n, float(np.sum(np.asarray(flagged)[sel])) / s, np.asarray(bits_)[:, sel].sum(axis=1) / s


#: Dumps read (from the start of each time bin of the occupancy image) for the data image.
DATA_DUMPS_PER_BIN = 4


def _image_row(block, lo, hi, p, cs):
    """One time bin of the data image from dumps ``lo:hi`` of ``block`` (a
    :meth:`rfisieve.io.scan.Scan.read` dict): product ``p``'s power averaged over those
    dumps (invalid or upstream-flagged samples left out), then within the channel bins."""
    v = np.abs(block["data"][lo:hi, :, p]).astype(np.float64)
    bad = ~np.isfinite(v) | (v <= 0)
    if "flags" in block:
        bad |= block["flags"][lo:hi, :, p]
    v[bad] = np.nan
    with np.errstate(all="ignore"), _quiet():
        return _bin_mean(np.nanmean(v, axis=0), cs)


def _image_db(img):
    """The data image relative to the bandpass (each channel bin's median over time), dB."""
    with np.errstate(all="ignore"), _quiet():
        bandpass = np.nanmedian(img, axis=0)
        return 10 * np.log10(img / bandpass[None, :])


def _image_note(product, dumps_per_bin):
    return f"product {product}, {dumps_per_bin} dumps read per time bin"


class DataImage:
    """The data image of one scan, taken from the blocks the flag job reads anyway.

    The same picture as :func:`data_preview` (same dumps, product, bins and arithmetic;
    ``tests/test_night.py`` checks they are equal), gathered while the data are in
    memory so that the review need not read the scan file again.  Pass :meth:`add` as
    the ``observe_data`` hook of :func:`rfisieve.engine.flag_scan`; blocks may overlap
    and arrive in any order.

    Parameters
    ----------
    time_start, chan_start : ndarray of int
        The occupancy image's bins (:class:`rfisieve.review.counts.ScanOccupancy`).
    product : int
        Index of the product shown (:attr:`rfisieve.io.scan.Scan.first_auto`).
    name : str
        Its name, for the note.
    """

    def __init__(self, time_start, chan_start, product, name, dumps_per_bin=DATA_DUMPS_PER_BIN):
        self.ts = np.asarray(time_start, np.int64)
        self.cs = np.asarray(chan_start, np.int64)
        self.p, self.name, self.k = int(product), str(name), int(dumps_per_bin)
        self.stop = np.minimum(self.ts[1:], self.ts[:-1] + self.k)  # each bin's dumps: ts[i]:stop[i]
        self.img = np.full((len(self.ts) - 1, len(self.cs) - 1), np.nan)
        self.done = np.zeros(len(self.ts) - 1, bool)
        self._part = {}  # bin -> {dump: that dump's rows} for bins split between blocks

    def add(self, start, block):
        """Take the image's dumps from ``block``, which holds dumps ``start:start + n``."""
        n = int(block["data"].shape[0])
        end = start + n
        first = max(0, int(np.searchsorted(self.ts, start, side="right")) - 1)
        for i in range(first, len(self.done)):
            a, b = int(self.ts[i]), int(self.stop[i])
            if a >= end:
                break
            if self.done[i] or b <= start:
                continue
            if a >= start and b <= end:
                self.img[i] = _image_row(block, a - start, b - start, self.p, self.cs)
                self.done[i] = True
                continue
            part = self._part.setdefault(i, {})  # the bin's dumps straddle blocks: keep its rows
            lo, hi = max(a, start), min(b, end)
            for key in ("data", "flags"):
                if key in block:
                    part.setdefault(key, {}).update(
                        {t: block[key][t - start:t - start + 1, :, self.p:self.p + 1].copy() for t in range(lo, hi)})
            if len(part["data"]) == b - a:
                whole = {key: np.concatenate([rows[t] for t in range(a, b)]) for key, rows in part.items()}
                self.img[i] = _image_row(whole, 0, b - a, 0, self.cs)
                self.done[i] = True
                del self._part[i]

    def result(self):
        """(dB image, note), or None when some dump of the image was never seen."""
        if not self.done.all():
            return None
        return _image_db(self.img), _image_note(self.name, self.k)


def data_preview(scan_path, time_start, chan_start, dumps_per_bin=DATA_DUMPS_PER_BIN, expect_size=None):
    """Downsampled dynamic spectrum of one auto product of a scan, normalised by its bandpass.

    The scan file is opened read-only (:func:`rfisieve.io.scan.open_scan`, default layout)
    and, for each time bin of the occupancy image (``time_start``), only its first
    ``dumps_per_bin`` dumps are read and averaged; channels are averaged within the
    image's channel bins (``chan_start``).  Each channel bin is then divided by its
    median over time (the bandpass) and given in dB.  The flag job takes the same image
    while it reads the scan (:class:`DataImage`) and stores it in the occupancy file;
    the review calls this only for occupancy files without one.

    Returns
    -------
    (ndarray (ntbin, ncbin) of float or None, str)
        The image (NaN where nothing valid was read) and a note: the product shown, or
        why there is no image.
    """
    from rfisieve.errors import RfisieveError
    from rfisieve.io.scan import open_scan

    if not scan_path:
        return None, "the mask file does not name its scan file"
    if not os.path.isfile(scan_path):
        return None, f"scan file {scan_path} not found"
    ts, cs = np.asarray(time_start, np.int64), np.asarray(chan_start, np.int64)
    try:
        with open_scan(scan_path) as sc:
            if sc.nchan != int(cs[-1]) or sc.ntime != int(ts[-1]):
                return None, f"scan file {scan_path} no longer matches the mask ({sc.ntime} x {sc.nchan})"
            p = sc.first_auto
            img = np.full((len(ts) - 1, len(cs) - 1), np.nan)
            for i in range(len(ts) - 1):
                a = int(ts[i])
                b = min(int(ts[i + 1]), a + int(dumps_per_bin))
                img[i] = _image_row(sc.read(a, b, what=("data", "flags"), prod=p), 0, b - a, 0, cs)
            prod = sc.products[p]
    except RfisieveError as err:
        return None, str(err)
    db = _image_db(img)
    note = _image_note(prod, dumps_per_bin)
    if expect_size is not None and os.path.getsize(scan_path) != int(expect_size):
        note += "; the scan file's size changed since it was flagged"
    return db, note


def _bin_mean(x, starts):
    """Mean of the finite values of ``x`` within each bin ``starts[j]:starts[j + 1]`` (NaN if none)."""
    ok = np.isfinite(x)
    total = np.add.reduceat(np.where(ok, x, 0.0), starts[:-1])
    count = np.add.reduceat(ok.astype(np.int64), starts[:-1])
    return np.where(count > 0, total / np.maximum(count, 1), np.nan)


class _quiet:
    """Silence numpy's "mean of empty slice" warnings inside a block."""

    def __enter__(self):
        import warnings

        self._w = warnings.catch_warnings()
        self._w.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc):
        self._w.__exit__(*exc)
        return False
