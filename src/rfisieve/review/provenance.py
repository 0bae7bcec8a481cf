"""What produced the flags, read from files: mask-file attributes, failed scans, scan previews.

The review reads files only (never the engine's internals):

* each mask file (``<outdir>/flags/<scan>.h5``, docs/design.md 3.2) records the package
  version (``rfisieve_version``), the band settings as used (``band_settings``, JSON),
  the band config's path and the input file's identity (``input_identity``, JSON with
  ``path`` and ``size``);
* ``<outdir>/failed_scans.csv`` (columns ``scan,path,stage,reason``) names the scans
  that failed at any stage of the night;
* the scan file itself, opened read-only, gives a downsampled dynamic spectrum on the
  time and channel bins of the occupancy image.

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


def data_preview(scan_path, time_start, chan_start, dumps_per_bin=4, expect_size=None):
    """Downsampled dynamic spectrum of one auto product of a scan, normalised by its bandpass.

    The scan file is opened read-only (:func:`rfisieve.io.scan.open_scan`, default layout)
    and, for each time bin of the occupancy image (``time_start``), only its first
    ``dumps_per_bin`` dumps are read and averaged; channels are averaged within the
    image's channel bins (``chan_start``).  Each channel bin is then divided by its
    median over time (the bandpass) and given in dB.

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
            p = int(np.flatnonzero(sc.autos)[0]) if sc.autos.any() else 0
            img = np.full((len(ts) - 1, len(cs) - 1), np.nan)
            for i in range(len(ts) - 1):
                a = int(ts[i])
                b = min(int(ts[i + 1]), a + int(dumps_per_bin))
                blk = sc.read(a, b, what=("data", "flags"), prod=p)
                v = np.abs(blk["data"][..., 0]).astype(np.float64)
                bad = ~np.isfinite(v) | (v <= 0)
                if "flags" in blk:
                    bad |= blk["flags"][..., 0]
                v[bad] = np.nan
                with np.errstate(all="ignore"), _quiet():
                    spec = np.nanmean(v, axis=0)
                    img[i] = _bin_mean(spec, cs)
            prod = sc.products[p]
    except RfisieveError as err:
        return None, str(err)
    with np.errstate(all="ignore"), _quiet():
        bandpass = np.nanmedian(img, axis=0)
        db = 10 * np.log10(img / bandpass[None, :])
    note = f"product {prod}, {dumps_per_bin} dumps read per time bin"
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
