"""The workflow's per-scan job and its end of night.

``rfisieve flag`` is the one job per scan: it checks the scan, checks the night's plan
against the file it reads, runs both detectors and the merge in one pass over the scan
(:func:`rfisieve.engine.stages.flag_scan`: (chunk x product) dask tasks over one read of
each chunk), counts occupancy from the finished mask in one compiled pass, takes the
review's data image from the data as they are read, and ends
with the scan record (:mod:`rfisieve.engine.night`).  A scan that fails at any stage
gets a record saying where and why, and the job exits 0, so that the other scans and
the review go on; ``--strict`` exits 2 instead.

``rfisieve wrap-up`` ends the night: ``<outdir>/failed_scans.csv`` (always, header only
when no scan failed) and the review page and run tables for the scans that were
flagged.  ``rfisieve verdict`` fails (exit 1) when any scan failed, so that Snakemake
and a scheduler see the night as failed while every output is there.
"""

import csv
import json
import os
import sys
import time
import traceback

from rfisieve.errors import RfisieveError
from rfisieve.commands import add_command


class _ScanFailed(Exception):
    def __init__(self, stage, reason):
        super().__init__(reason)
        self.stage, self.reason = stage, " ".join(str(reason).split())


class ProgressFile:
    """Chunk progress of one scan: a line in the job's log about every 10 %, and a small
    JSON file (``done``, ``total`` chunks, ``samples``) that ``rfisieve run`` polls to
    show the night's progress on the terminal."""

    def __init__(self, path, scan, samples, log_label):
        from rfisieve.cli import _Progress

        self.path, self.scan, self.samples = path, scan, int(samples)
        self.log = _Progress(log_label)
        self.t0 = time.time()
        self.write(0, 1)

    def write(self, done, total):
        if not self.path:
            return
        tmp = f"{self.path}.{os.getpid()}.tmp"
        try:
            os.makedirs(os.path.dirname(os.path.abspath(self.path)), exist_ok=True)
            with open(tmp, "w", encoding="utf-8") as fh:
                json.dump({"scan": self.scan, "done": done, "total": total, "samples": self.samples,
                           "started": self.t0}, fh)
            os.replace(tmp, self.path)
        except OSError:
            pass  # progress is a courtesy, never a reason to fail

    def __call__(self, done, total):
        self.log(done, total)
        self.write(done, total)

    def close(self):
        if self.path:
            for p in (self.path, f"{self.path}.{os.getpid()}.tmp"):
                try:
                    os.unlink(p)
                except OSError:
                    pass


def _check_plan(expect, entry):
    """The night's plan of this scan (``expect``) against the file as it is now."""
    if not expect:
        return
    now_shape, now_id = entry["shape"], entry["identity"]
    if list(expect.get("shape") or []) != list(now_shape):
        raise _ScanFailed("plan", f"{entry['path']}: changed after the night was planned (shape "
                                  f"{tuple(expect['shape'])} -> {tuple(now_shape)}); not flagged "
                                  "with a stale plan, run again to flag it as it is now")
    if any(expect.get("identity", {}).get(k) != now_id[k] for k in ("size", "mtime", "sha256_head")):
        raise _ScanFailed("plan", f"{entry['path']}: written to or replaced after the night was planned "
                                  "(size, mtime or content differs); not flagged with a stale plan, "
                                  "run again")


def flag_one(scan_path, outputs, run, expect=None, keep_partial=None, strict=False, bands=None, jobs=1):
    """Flag one scan end to end and write its record; returns the record (a dict).

    ``outputs``: :func:`rfisieve.engine.night.scan_outputs` of the scan.  ``expect``:
    the night's plan of the scan (``shape``, ``identity``) from
    :func:`rfisieve.engine.night.check_scan`.  ``keep_partial``: a directory that also
    receives each detector's partial mask (``<scan>.<detector>.h5``).  ``jobs``: flag
    jobs running at once on this machine (they share its memory budget).  Outputs that
    stand (same scan, settings and version, :func:`rfisieve.engine.night.outputs_stand`)
    are kept and only the record is written: a job stopped halfway redoes only its
    unfinished scans.
    """
    from rfisieve import __version__
    from rfisieve.engine import night

    t0 = time.monotonic()
    bands = bands or night.BandCache(run["bands_dir"])
    record = {"scan": night.scan_name(scan_path), "path": str(scan_path), "version": __version__,
              "status": "failed", "stage": "check", "reason": ""}
    written = []
    prog = None
    try:
        entry = night.check_scan(scan_path, run, bands)
        record.update(band=entry["band"], shape=entry["shape"], identity=entry["identity"],
                      settings=entry["settings"])
        if entry["problem"]:
            raise _ScanFailed(**entry["problem"])
        _check_plan(expect, entry)
        reuse = not keep_partial and night.outputs_stand(entry, outputs, run)
        if not reuse:
            band, source = bands.get(entry["band"])
            nt, nc, npr = entry["shape"]
            prog = ProgressFile(outputs.get("progress"), record["scan"], nt * nc * npr,
                                f"flag {os.path.basename(str(scan_path))}")
            counted, image = _flag_stage(scan_path, outputs, band, source, run, prog, written, entry, jobs)
            if keep_partial:
                _keep_partial(scan_path, keep_partial, record["scan"], band, run, written, jobs)
            _occupancy_stage(outputs, written, counted, image)
        record.update(status="flagged", stage="", reason="", reused=bool(reuse),
                      outputs={k: os.path.abspath(outputs[k]) for k in ("mask", "occupancy_csv", "occupancy_h5")})
    except _ScanFailed as err:
        record.update(stage=err.stage, reason=err.reason)
    except RfisieveError as err:
        record.update(reason=" ".join(str(err).split()))
    except Exception as err:  # a bug must not cost the night either; its traceback goes to the log
        if strict:
            raise
        traceback.print_exc()
        record.update(reason=f"{scan_path}: internal error ({type(err).__name__}: "
                             f"{' '.join(str(err).split())[:200]}); see the job's log")
    finally:
        if prog is not None:
            prog.close()
    record["seconds"] = round(time.monotonic() - t0, 3)
    if record["status"] != "flagged":
        for path in written:  # no partial output of a failed scan
            try:
                os.unlink(path)
            except OSError:
                pass
        print(f"rfisieve flag: scan {record['scan']} failed at {record['stage']}: {record['reason']}",
              file=sys.stderr)
        if strict:
            raise RfisieveError(record["reason"])
    night.write_record(outputs["record"], record)
    return record


def flag_scans(paths, outdir, run, expect=None, keep_partial=False, strict=False, jobs=1):
    """:func:`flag_one` for each scan in turn, in this one process; returns the records."""
    from rfisieve.engine import night

    bands = night.BandCache(run["bands_dir"])
    records = []
    for path in paths:
        scan = night.scan_name(path)
        partial_dir = os.path.join(str(outdir), "partial") if keep_partial else None
        rec = flag_one(path, night.scan_outputs(outdir, scan), run, expect=(expect or {}).get(scan),
                       keep_partial=partial_dir, strict=strict, bands=bands, jobs=jobs)
        what = "kept (outputs stand)" if rec.get("reused") else rec["status"]
        print(f"rfisieve flag: scan {scan} {what} in {rec['seconds']:.1f} s", file=sys.stderr, flush=True)
        records.append(rec)
    return records


def _flag_stage(scan_path, outputs, band, source, run, prog, written, entry, jobs=1):
    """Flag the scan into its mask file; returns (counts, data image): the occupancy
    counts taken while the mask was in memory (a ScanOccupancy), or None when the
    per-channel cut changed the mask after that (the counts are then taken from the
    file); and the review's data image taken while the data were in memory
    (:meth:`rfisieve.review.provenance.DataImage.result`)."""
    import rfisieve.engine as engine
    from rfisieve.engine import night
    from rfisieve.review.counts import ScanOccupancy
    from rfisieve.review.provenance import DataImage

    stage = "flag"
    acc = ScanOccupancy(*entry["shape"])
    image = DataImage(acc.time_start, acc.chan_start, *entry["image_product"])
    try:
        done = engine.flag_scan(scan_path, outputs["mask"], band, run, band_source=source, progress=prog,
                                jobs=jobs, observe=acc.add, observe_data=image.add)
    except RfisieveError as err:
        raise _ScanFailed(stage, err) from None
    written.append(outputs["mask"])
    if night.identity(scan_path) != entry["identity"]:
        raise _ScanFailed(stage, f"{scan_path}: changed while it was being flagged; its mask is "
                                 "discarded, run again to flag it as it is now")
    return (None if done["channel_cut"] else acc), image.result()


def _keep_partial(scan_path, directory, scan, band, run, written, jobs=1):
    """Each detector's partial mask as well (the debugging option ``keep_partial``)."""
    import rfisieve.engine as engine

    for detector in engine.DETECTORS:
        out = os.path.join(directory, f"{scan}.{detector}.h5")
        try:
            engine.detect(scan_path, out, detector, band, run, jobs=jobs)
        except RfisieveError as err:
            raise _ScanFailed("flag", err) from None
        written.append(out)


def _occupancy_stage(outputs, written, counted=None, image=None):
    from rfisieve.review import occupancy

    try:
        occupancy.occupancy_of_mask(outputs["mask"], outputs["occupancy_csv"], outputs["occupancy_h5"],
                                    counted=counted, data_image=image)
    except RfisieveError as err:
        raise _ScanFailed("occupancy", err) from None
    written += [outputs["occupancy_csv"], outputs["occupancy_h5"]]


# -- end of the night -----------------------------------------------------------------
def write_failed(path, rows):
    """``failed_scans.csv`` (columns scan,path,stage,reason; header only when none)."""
    from rfisieve.engine.night import FAILED_COLUMNS
    from rfisieve.io.scan import atomic_output

    with atomic_output(path) as tmp, open(tmp, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(FAILED_COLUMNS))
        w.writeheader()
        w.writerows(rows)


def read_failed(path):
    """Rows of a failed_scans.csv as dicts, [] when it is missing."""
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            return list(csv.DictReader(fh))
    except OSError:
        return []


def wrap_up(outdir, record_paths, bands_dir=None, previous=None, workers=1):
    """failed_scans.csv, then run tables and the review page for the flagged scans.

    Returns (flagged records, failed rows).
    """
    from rfisieve.engine import night

    records = []
    for path in record_paths:
        rec = night.read_record(path)
        if rec is None:
            name = os.path.basename(path)[:-5] if path.endswith(".json") else os.path.basename(path)
            rec = {"scan": name, "path": "", "status": "failed", "stage": "flag",
                   "reason": f"{path}: the scan's job left no readable record"}
        records.append(rec)
    failed = night.failed_rows(records)
    flagged = [r for r in records if r.get("status") == "flagged"]
    write_failed(os.path.join(outdir, "failed_scans.csv"), failed)
    from rfisieve.review.page import build_review

    build_review(outdir, [r["outputs"]["occupancy_h5"] for r in flagged], previous=previous,
                 bands_dir=bands_dir, workers=workers)
    return flagged, failed


def failed_text(rows, total=None):
    """Terminal lines naming each failed scan with its one-line reason."""
    if not rows:
        return []
    of = f" of {total}" if total else ""
    plural = "s" if (total or len(rows)) != 1 else ""
    lines = [f"{len(rows)}{of} scan{plural} failed (listed in failed_scans.csv):"]
    for r in rows:
        lines.append(f"  {r['scan']} [{r['stage']}]: {r['reason']}")
    return lines


# -- commands -------------------------------------------------------------------------
def cmd_flag(args):
    from rfisieve.cli import _run_settings

    from rfisieve.errors import ConfigError

    run = _run_settings(args)
    if args.jobs_at_once < 1:
        raise ConfigError("--jobs-at-once", f"{args.jobs_at_once}: expected a whole number >= 1")
    expect = json.loads(args.expect) if args.expect else None
    flag_scans(args.scans, args.outdir, run, expect=expect, keep_partial=args.keep_partial,
               strict=args.strict, jobs=args.jobs_at_once)
    return 0


def cmd_wrap_up(args):
    flagged, failed = wrap_up(args.outdir, args.records, bands_dir=args.bands_dir, previous=args.previous,
                              workers=args.workers)
    print(f"rfisieve wrap-up: {len(flagged)} scan(s) flagged, {len(failed)} failed; review page "
          f"{os.path.join(args.outdir, 'report', 'index.html')}", file=sys.stderr)
    for line in failed_text(failed, len(flagged) + len(failed)):
        print(line, file=sys.stderr)
    return 0


def cmd_verdict(args):
    rows = read_failed(args.failed)
    if rows:
        for line in failed_text(rows):
            print(line, file=sys.stderr)
        return 1
    if args.out:
        from rfisieve.io.scan import atomic_output

        with atomic_output(args.out) as tmp, open(tmp, "w", encoding="utf-8") as fh:
            fh.write("every scan of the night was flagged\n")
    return 0


def register(sub, formatter, add_run_options, add_parallel_options):
    """Add ``flag``, ``wrap-up`` and ``verdict`` to the ``rfisieve`` parser."""
    p = add_command(
        sub, "flag", cmd_flag,
        formatter=formatter,
        help="workflow job: scans end to end (checks, both detectors, merge, occupancy, record)",
        description="For each scan in turn, in one process: check the scan (and the night's plan "
                    "of it), run both detectors and the merge in one pass over the scan on dask "
                    "workers, count occupancy from the finished mask, and write the scan record "
                    "<outdir>/scans/<scan>.json. A scan that fails at any stage gets a record "
                    "naming the stage and the one-line reason (exit 0; --strict: exit 2). Outputs "
                    "made from the same scan, settings and version are kept.",
        options=[
            ("scans", {"nargs": "+", "metavar": "SCAN", "help": "scan file(s) (HDF5), flagged in turn"}),
            ("--outdir", {"required": True, "metavar": "DIR",
                          "help": "output directory: flags/<scan>.h5, occupancy/<scan>.{csv,h5}, scans/<scan>.json"}),
            ("--expect", {"metavar": "JSON",
                          "help": "the night's plan: {scan: {shape, identity}}; a scan that differs is not flagged"}),
            ("--keep-partial", {"action": "store_true",
                                "help": "also write each detector's partial mask to <outdir>/partial/<scan>.<detector>.h5"}),
            ("--strict", {"action": "store_true", "help": "a failing scan is an error (exit 2)"}),
        ])
    add_run_options(p)
    add_parallel_options(p)

    p = add_command(
        sub, "wrap-up", cmd_wrap_up,
        formatter=formatter,
        help="workflow job: failed_scans.csv, run tables and the review page from the scan records",
        description="Read the night's scan records; write <outdir>/failed_scans.csv (scan,path,stage,"
                    "reason; header only when none failed) and, for the scans that were flagged, "
                    "occupancy/run.csv, occupancy/run.h5 and report/index.html.",
        options=[
            ("outdir", {"metavar": "OUTDIR", "help": "the run's output directory"}),
            ("--records", {"nargs": "*", "default": [], "metavar": "SCAN.json", "help": "scan records"}),
            ("--bands-dir", {"metavar": "DIR", "help": "band configs (for their emitter lists)"}),
            ("--previous", {"metavar": "RUN.csv", "help": "run.csv of an earlier run to compare with"}),
            ("--workers", {"type": int, "default": 1, "metavar": "N",
                           "help": "processes drawing the per-scan figures (default: 1)"}),
        ])

    p = add_command(
        sub, "verdict", cmd_verdict,
        formatter=formatter,
        help="workflow job: exit 1 when failed_scans.csv lists any scan",
        description="Print the failed scans of a night with their reasons and exit 1 when there "
                    "are any; otherwise write --out and exit 0.",
        options=[
            ("failed", {"metavar": "FAILED.csv", "help": "<outdir>/failed_scans.csv"}),
            ("--out", {"metavar": "FILE", "help": "file written when no scan failed"}),
        ])
