"""The night as a whole: per-scan checks done once, scan records, and provenance.

The workflow (workflow/rules/common.smk) calls :func:`check_night` once when Snakemake
reads the Snakefile: every scan is opened read-only and validated, and its band config
is loaded, in that one process.  A scan that fails is *quarantined*, not fatal: its
problem is kept with the scan, and the night goes on with the others (``strict``
raises the first problem instead).

Each scan's job (``rfisieve flag``) ends by writing a *scan record*,
``<outdir>/scans/<scan>.json``: whether the scan was flagged or failed, at which stage
and why, and the provenance of its mask (the input's identity, the band config's
digest, the package version).  The record is the job's Snakemake output, so a failed
scan is an answer too and the review still runs for the scans that finished.

What is redone is decided by provenance, not by modification times:
:func:`stale_reason` compares a scan's record and its mask file's own attributes with
the scan and band config as they are now.  The workflow removes the record of a stale
scan before Snakemake builds its job graph, so the scan is flagged again (with or
without Snakemake's own metadata in ``.snakemake``).  A failed scan is retried on the
next run.
"""

import hashlib
import json
import os
from pathlib import Path

from rfisieve import __version__
from rfisieve.config import load as config
from rfisieve.errors import RfisieveError
from rfisieve.io.scan import file_identity, open_scan, scan_name

#: Stages named in scan records and failed_scans.csv.
STAGES = ("check", "plan", "flag", "occupancy")

#: Columns of ``<outdir>/failed_scans.csv`` (a contract with the review page).
FAILED_COLUMNS = ("scan", "path", "stage", "reason")


def digest(text):
    """Short sha256 digest of a text (band config contents, settings)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def settings_digest(band_text, run):
    """Digest of everything in the settings that changes a mask: the band config's
    contents and the run's dataset layout (chunking and workers do not change masks)."""
    layout = json.dumps(run.get("layout") or {}, sort_keys=True)
    return digest(f"{band_text}\n--layout {layout}")


#: What a mask's recorded input identity must match (:func:`rfisieve.io.scan.file_identity`).
#: The mtime is in: a recorder may fill a preallocated file (same size, same first MiB);
#: a ``touch`` then costs a redo, never a stale mask.  The size and the first MiB's digest
#: catch a file replaced by ``cp -p`` or ``rsync -a``, which keep the old mtime.
IDENTITY_KEYS = ("path", "size", "mtime", "sha256_head")


def identity(path):
    """The input file's identity as recorded in its mask (:data:`IDENTITY_KEYS`)."""
    ident = file_identity(path)
    return {k: ident[k] for k in IDENTITY_KEYS}


class BandCache:
    """Band configs loaded once per night: ``get(band) -> (settings, source)`` or raises."""

    def __init__(self, bands_dir):
        self.bands_dir = str(bands_dir)
        self._seen = {}

    def get(self, band):
        if band not in self._seen:
            try:
                self._seen[band] = config.load_band(self.bands_dir, band)
            except RfisieveError as err:
                self._seen[band] = err
        got = self._seen[band]
        if isinstance(got, Exception):
            raise got
        return got


def _one_line(err):
    return " ".join(str(err).split())


def check_scan(path, run, bands):
    """Check one scan of the night; returns its entry (a dict), never raises for the scan.

    Entry keys: ``scan``, ``path``, ``band`` (or None), ``band_path`` (or None),
    ``shape`` (ntime, nchan, nprod), ``identity`` (:func:`identity`), ``settings``
    (:func:`settings_digest`), ``image_product`` (index and name of the product the
    review's data image shows: the first auto product, else the first) and ``problem``:
    None, or ``{"stage", "reason"}`` with the one-line reason (which names the file).
    """
    entry = {"scan": scan_name(path), "path": str(path), "band": None, "band_path": None,
             "shape": None, "identity": None, "settings": None, "image_product": None, "problem": None}
    try:
        with open_scan(path, run.get("layout")) as scan:
            entry["band"] = scan.band
            entry["shape"] = [int(scan.ntime), int(scan.nchan), int(scan.nprod)]
            entry["image_product"] = [scan.first_auto, str(scan.products[scan.first_auto])]
        entry["band_path"] = config.band_config_path(bands.bands_dir, entry["band"])
        band, source = bands.get(entry["band"])
        entry["settings"] = settings_digest(source["text"], run)
        if band.get("band") and band["band"] != entry["band"]:
            raise RfisieveError(f"{path}: band is {entry['band']!r} but its band config is for {band['band']!r}")
        entry["identity"] = identity(path)
    except (RfisieveError, OSError) as err:
        entry["problem"] = {"stage": "check", "reason": _one_line(err)}
        if entry["band"] is not None and not os.path.isfile(entry["band_path"] or ""):
            entry["band_path"] = None
    return entry


def check_night(paths, run, strict=False):
    """:func:`check_scan` for every path, with band configs loaded once per band.

    With ``strict`` the first problem is raised (the night stops before anything runs).
    """
    bands = BandCache(os.path.abspath(run["bands_dir"]))
    entries = {}
    for path in paths:
        entry = check_scan(path, run, bands)
        if strict and entry["problem"]:
            raise RfisieveError(entry["problem"]["reason"])
        entries[entry["scan"]] = entry
    return entries


# -- scan records ------------------------------------------------------------------
def record_path(outdir, scan):
    return os.path.join(str(outdir), "scans", f"{scan}.json")


def scan_outputs(outdir, scan):
    """Paths of one scan's outputs under ``outdir`` (docs/design.md 3.2-3.3) and its record."""
    o = str(outdir)
    return {"mask": os.path.join(o, "flags", f"{scan}.h5"),
            "occupancy_csv": os.path.join(o, "occupancy", f"{scan}.csv"),
            "occupancy_h5": os.path.join(o, "occupancy", f"{scan}.h5"),
            "record": record_path(o, scan),
            "progress": os.path.join(o, "logs", "flag", f"{scan}.progress")}


#: Samples of a small scan at most (:func:`is_small`): 4096 x 1024 x 4, so that several
#: small-scan jobs side by side stay light (bench/throughput.py: a flag job of one
#: 12.6 M-sample scan peaks at about 410 MiB).
SMALL_SCAN_SAMPLES = 1 << 24


def _samples(entry):
    """Samples of a night entry's scan (0 when it could not be read)."""
    shape = entry["shape"]
    return 0 if shape is None else int(shape[0]) * int(shape[1]) * int(shape[2])


def is_small(entry, small_dumps):
    """True for a scan of at most ``small_dumps`` dumps (one chunk: one dask task per
    product group) and :data:`SMALL_SCAN_SAMPLES` samples, or one that could not be
    read (its job only records the problem)."""
    return entry["shape"] is None or (int(entry["shape"][0]) <= int(small_dumps)
                                      and _samples(entry) <= SMALL_SCAN_SAMPLES)


#: Small scans per flag job at most (:func:`batches`): a night of many small scans runs
#: as several one-core jobs side by side.  A fixed number, not the cores: a job's scans
#: are part of its params, so a grouping that followed ``--cores`` would start every
#: job again whenever the cores changed (each would keep its finished scans, but pay
#: its start-up).
SMALL_SCANS_PER_JOB = 12


def batches(entries, samples_per_job, max_scans=64, small_dumps=0):
    """The night's scans in jobs: {name: [scan, ...]}.

    Scans of one band, in name order, share a job (one process, one start-up) up to
    ``samples_per_job`` samples or ``max_scans`` scans; a larger scan has a job of its
    own, and ``samples_per_job`` = 0 gives every scan its own job.  Jobs never mix
    bands, so editing one band's config re-runs only that band's jobs.  A scan whose
    band is unknown has a job of its own (it only records its problem).

    Small scans (:func:`is_small`) are batched apart from the band's larger ones, in
    jobs of at most :data:`SMALL_SCANS_PER_JOB` scans, in even counts (so a budget of
    ``samples_per_job`` holds on average): a small scan is
    one task or two, so a job flagging them one after the other keeps one core busy,
    mostly in Python between scans.  Such jobs take one core each
    (:func:`batch_threads`), and Snakemake runs as many at once as it has cores.
    """
    out = {}
    by_band = {}
    for scan in sorted(entries):
        by_band.setdefault(entries[scan]["band"] or "", []).append(scan)

    for band in sorted(by_band):
        small = [s for s in by_band[band] if band and is_small(entries[s], small_dumps)]
        # jobs of even counts, as many as the scan limit or the sample budget asks for
        if small and samples_per_job > 0:
            total = sum(_samples(entries[s]) for s in small)
            k = max(-(-len(small) // SMALL_SCANS_PER_JOB), -(-total // samples_per_job))
            for i in range(k):
                part = small[i * len(small) // k:(i + 1) * len(small) // k]
                if part:
                    out[part[0]] = part
        else:
            small = []
        taken = set(small)
        total, current = 0, []
        for scan in by_band[band]:
            if scan in taken:
                continue
            n = _samples(entries[scan])
            if current and (total + n > samples_per_job or len(current) >= max_scans):
                out[current[0]] = current
                total, current = 0, []
            current.append(scan)
            total += n
        if current:
            out[current[0]] = current
    return out


def batch_threads(entries, scans, threads, small_dumps):
    """Cores a flag job reserves: one for a job of small scans (:func:`batches`), else
    ``threads`` (the dask workers)."""
    return 1 if all(is_small(entries[s], small_dumps) for s in scans) else int(threads)


def read_record(path):
    """A scan record as a dict, or None when it is missing or unreadable."""
    try:
        with open(path, encoding="utf-8") as fh:
            rec = json.load(fh)
    except (OSError, ValueError):
        return None
    return rec if isinstance(rec, dict) and "status" in rec else None


def write_record(path, record):
    from rfisieve.io.scan import atomic_output

    os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
    with atomic_output(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        json.dump(record, fh, indent=1, sort_keys=True)
        fh.write("\n")


def _mask_provenance(mask_path):
    """(input identity dict, band config text, version) recorded in a mask file, or None."""
    import h5py

    try:
        with h5py.File(mask_path, "r") as f:
            a = f.attrs
            ident = json.loads(str(a.get("input_identity", "{}")))
            return ident, str(a.get("band_config_text", "")), str(a.get("rfisieve_version", ""))
    except (OSError, ValueError, KeyError):
        return None


def outputs_stand(entry, outputs, run):
    """True when a scan's mask and occupancy files exist and the mask's provenance
    matches the scan and settings as they are now (its job may then reuse them)."""
    rec = {"status": "flagged", "outputs": {k: outputs[k] for k in ("mask", "occupancy_csv", "occupancy_h5")}}
    return not entry.get("problem") and stale_reason(entry, rec, run) is None


def stale_reason(entry, record, run):
    """Why the scan of ``entry`` must be flagged again, or None when its outputs stand.

    ``record`` is the scan's record (:func:`read_record`).  A flagged scan stands only
    while its mask file exists and the mask's own attributes match the scan's identity
    (path, size, head digest), the band config's contents (and layout) and this
    package's version.  A failed scan is retried unless it fails the same way now.
    """
    if record is None:
        return None  # nothing to redo: Snakemake runs the job anyway
    if record.get("status") != "flagged":
        problem = entry.get("problem")
        if problem and problem["reason"] == record.get("reason"):
            return None
        return "it failed last time"
    if entry.get("problem"):
        return "it no longer passes its checks"
    mask = record.get("outputs", {}).get("mask")
    if not mask or not os.path.isfile(mask):
        return "its mask file is missing"
    prov = _mask_provenance(mask)
    if prov is None:
        return "its mask file cannot be read"
    ident, band_text, version = prov
    now = entry["identity"]
    if any(ident.get(k) != now[k] for k in IDENTITY_KEYS):
        return "the scan file is not the one its mask was made from"
    if settings_digest(band_text, run) != entry["settings"]:
        return "its band config changed since its mask was made"
    if version != __version__:
        return f"its mask was made by rfisieve {version or '?'}, this is {__version__}"
    for key in ("mask", "occupancy_csv", "occupancy_h5"):
        out = record.get("outputs", {}).get(key)
        if out and not os.path.isfile(out):
            return f"its {key.replace('_', ' ')} file is missing"
    return None


def expire_stale(entries, outdir, run, remove=True):
    """Remove the records of scans whose outputs no longer stand; {scan: reason}.

    With ``remove=False`` (a dry run) nothing is removed; the reasons are returned.
    """
    stale = {}
    for scan, entry in entries.items():
        path = record_path(outdir, scan)
        reason = stale_reason(entry, read_record(path), run)
        if reason:
            stale[scan] = reason
            if remove:
                Path(path).unlink(missing_ok=True)
    return stale


def failed_rows(records):
    """Rows of failed_scans.csv (dicts with :data:`FAILED_COLUMNS`) from scan records."""
    rows = []
    for rec in records:
        if rec.get("status") != "flagged":
            rows.append({k: str(rec.get(k, "")) for k in FAILED_COLUMNS})
    return sorted(rows, key=lambda r: r["scan"])


__all__ = ["check_scan", "scan_outputs", "batches", "batch_threads", "is_small", "SMALL_SCANS_PER_JOB", "outputs_stand", "check_night", "stale_reason", "expire_stale", "record_path", "read_record",
           "write_record", "failed_rows", "identity", "settings_digest", "FAILED_COLUMNS", "STAGES"]
