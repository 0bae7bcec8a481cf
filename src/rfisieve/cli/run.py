"""``rfisieve run`` around Snakemake: the night's progress on the terminal, and its verdict.

:func:`follow` waits for the Snakemake process while a watcher thread reads what the
flag jobs leave in the output directory: the chunk progress file of the scan being
flagged (``logs/flag/<scan>.progress``) and the scan records (``scans/<scan>.json``).
On a terminal it keeps one status line up to date (the scan being flagged, its chunks,
the night's share of samples done and an estimate of the time left); into a file or a
pipe it writes a line when a scan finishes, at most one every :data:`LOG_EVERY`
seconds, so a log is never flooded.

:func:`verdict` reads the night's end (``failed_scans.csv``): every failed scan with its
one-line reason, and the exit status (1 when any scan failed).  When Snakemake itself
stopped before the review (a job killed, say), it writes the review page and
``failed_scans.csv`` for the scans that finished, so they are never lost.
"""

import glob
import json
import os
import re
import sys
import threading
import time

#: Seconds between progress lines when stderr is not a terminal.
LOG_EVERY = 30.0

#: Snakemake's routine chatter, left out of ``rfisieve run``'s terminal (``--verbose``
#: shows everything); errors and anything else pass through.
CHATTER = re.compile(
    r"^(Select jobs to execute\.\.\.|Execute \d+ jobs\.\.\.|Using shell: .*|Building DAG of jobs\.\.\."
    r"|Assuming unrestricted shared filesystem usage\.|Using workflow specific profile .*"
    r"|Config file .* is extended by additional config specified via the command line\."
    r"|Complete log\(s\): .*|Elapsed time: .*|host: .*|Provided cores: .*|Rules claiming more threads .*"
    r"|Job stats:.*|Nothing to be done .*|\s*)$")


def _shape_samples(path):
    try:
        import h5py

        with h5py.File(path, "r") as f:
            return int(f["data"].size) if "data" in f else 0
    except (OSError, KeyError, TypeError, ValueError):
        return 0


def _fmt_eta(seconds):
    if seconds is None:
        return "time left unknown"
    seconds = int(round(seconds))
    if seconds < 90:
        return f"~{seconds} s left"
    if seconds < 5400:
        return f"~{seconds // 60} min left"
    return f"~{seconds / 3600:.1f} h left"


class Watcher(threading.Thread):
    """Polls the outdir and draws the night's progress (see the module docstring)."""

    def __init__(self, outdir, paths, stream=None, interval=0.5):
        super().__init__(daemon=True, name="rfisieve-progress")
        from rfisieve.io.scan import scan_name

        self.outdir, self.stream, self.interval = outdir, stream or sys.stderr, interval
        self.scans = {scan_name(p): p for p in paths}
        self.samples = {}
        self.stop_event = threading.Event()
        self.t0 = time.time()
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.before = set(self._finished(since=0.0))  # scans already done when the run started
        self.last_line, self.last_print, self.width = "", 0.0, 0
        self.lock = threading.Lock()

    def emit(self, text):
        """Write a line of other output without tearing the status line."""
        with self.lock:
            if self.tty and self.width:
                self.stream.write("\r" + " " * self.width + "\r")
                self.width = 0
                self.last_line = ""
            self.stream.write(text if text.endswith("\n") else text + "\n")
            self.stream.flush()

    def _finished(self, since=None):
        """Scans whose record was written since ``since`` (default: this run's start)."""
        since = self.t0 - 1 if since is None else since
        done = []
        for scan in self.scans:
            try:
                if os.path.getmtime(os.path.join(self.outdir, "scans", f"{scan}.json")) >= since:
                    done.append(scan)
            except OSError:
                continue
        return done

    def _size(self, scan):
        if scan not in self.samples:
            self.samples[scan] = _shape_samples(self.scans[scan])
        return self.samples[scan]

    def status(self):
        """The status line now (str), or "" before anything is known."""
        finished = [s for s in self._finished() if s not in self.before]
        current = []
        for p in sorted(glob.glob(os.path.join(self.outdir, "logs", "flag", "*.progress"))):
            try:
                if os.path.getmtime(p) < self.t0 - 1:
                    continue  # left by a job of an earlier, killed run
                with open(p, encoding="utf-8") as fh:
                    current.append(json.load(fh))
            except (OSError, ValueError):
                continue
        todo = [s for s in self.scans if s not in self.before]
        if not todo:
            return ""
        total = sum(self._size(s) for s in todo)
        done = sum(self._size(s) for s in finished)
        for c in current:
            if c.get("scan") in self.scans and c["scan"] not in finished:
                done += int(c.get("samples", 0)) * c.get("done", 0) / max(1, c.get("total", 1))
        elapsed = time.time() - self.t0
        eta = None
        if done > 0 and elapsed > 2:
            eta = (total - done) * elapsed / done
        parts = []
        for c in current[:2]:
            parts.append(f"flagging {c.get('scan')} ({c.get('done', 0)}/{c.get('total', '?')} chunks)")
        if len(finished) >= len(todo) and not current:
            return f"night: {len(finished)}/{len(todo)} scans done; writing the review page"
        share = 100.0 * done / total if total else 100.0
        parts.append(f"night: {len(finished)}/{len(todo)} scans, {share:.0f} % of samples, {_fmt_eta(eta)}")
        return "; ".join(parts)

    def _draw(self, line, final=False):
        with self.lock:
            self._draw_locked(line, final)

    def _draw_locked(self, line, final):
        if self.tty:
            pad = max(0, self.width - len(line))
            self.stream.write("\r" + line + " " * pad + ("\n" if final else ""))
            self.width = len(line)
            self.stream.flush()
            return
        now = time.time()
        if final or now - self.last_print >= LOG_EVERY:
            self.stream.write(f"rfisieve run: {line}\n")
            self.stream.flush()
            self.last_print = now

    def run(self):
        self.last_print = time.time()  # the first file line after LOG_EVERY seconds
        while not self.stop_event.wait(self.interval):
            try:
                line = self.status()
            except Exception:  # progress is a courtesy: never let it stop the night
                continue
            if line and line != self.last_line:
                self._draw(line)
                self.last_line = line

    def stop(self):
        self.stop_event.set()
        self.join(timeout=5)
        if self.tty and self.last_line:
            self.stream.write("\n")
            self.stream.flush()


def _relay(pipe, watcher, stream):
    """Pass Snakemake's stderr on, without its routine chatter."""
    for line in iter(pipe.readline, ""):
        if CHATTER.match(line.rstrip("\n")):
            continue
        if watcher is not None:
            watcher.emit(line)
        else:
            stream.write(line)
            stream.flush()


def follow(proc, outdir, paths, show=True, stream=None):
    """Wait for the Snakemake process ``proc``, showing the night's progress; its exit status.

    When ``proc`` was started with ``stderr=subprocess.PIPE`` (text mode), its lines
    are relayed without Snakemake's routine chatter (:data:`CHATTER`).
    """
    stream = stream or sys.stderr
    watcher = Watcher(outdir, paths, stream=stream) if show and paths else None
    if watcher is not None:
        watcher.start()
    relay = None
    if proc.stderr is not None:
        relay = threading.Thread(target=_relay, args=(proc.stderr, watcher, stream), daemon=True)
        relay.start()
    try:
        rc = proc.wait()
        if relay is not None:
            relay.join(timeout=5)
        return rc
    finally:
        if watcher is not None:
            watcher.stop()


def _jobs_ran(outdir, since):
    for p in glob.glob(os.path.join(outdir, "logs", "flag", "*.log")):
        try:
            if os.path.getmtime(p) >= since:
                return True
        except OSError:
            continue
    return False


def verdict(outdir, paths, rc, bands_dir=None, previous=None, stream=None, since=None, strict=False):
    """The night's end as ``rfisieve run`` reports it; returns its exit status.

    0: every scan flagged.  1: the night ran to its end but some scans failed (each is
    printed with its reason).  2: Snakemake stopped for another reason; when flag jobs
    had started (after ``since``, a time.time() value) and not ``strict``, the review
    page and failed_scans.csv are then written here for the scans that finished, and
    scans with no record are listed as failed.
    """
    from rfisieve.cli import night as cli_night
    from rfisieve.engine import night
    from rfisieve.io.scan import scan_name

    stream = stream or sys.stderr
    failed_csv = os.path.join(outdir, "failed_scans.csv")
    rows = cli_night.read_failed(failed_csv)
    review_done = os.path.isfile(os.path.join(outdir, "report", "index.html")) and os.path.isfile(failed_csv)
    if rc != 0 and paths and not strict and (since is None or _jobs_ran(outdir, since)):
        records = [night.record_path(outdir, scan_name(p)) for p in paths]
        missing = [r for r in records if not os.path.isfile(r)]
        if missing or not review_done:
            print(f"rfisieve run: the workflow stopped (snakemake exit status {rc}); writing the review "
                  "page for the scans that finished", file=stream)
            for rec in missing:
                scan = os.path.basename(rec)[:-5]
                night.write_record(rec, {"scan": scan, "path": dict(zip(map(scan_name, paths), paths))[scan],
                                         "status": "failed", "stage": "flag",
                                         "reason": f"its job did not finish; see {outdir}/logs/flag/"})
            try:
                _, rows = cli_night.wrap_up(outdir, records, bands_dir=bands_dir, previous=previous)
            except Exception as err:  # the review page is a courtesy here
                print(f"rfisieve run: the review page could not be written ({err})", file=stream)
                rows = cli_night.read_failed(failed_csv)
            for rec in missing:  # not a result: the next run retries these scans
                try:
                    os.unlink(rec)
                except OSError:
                    pass
            for line in cli_night.failed_text(rows, len(paths)):
                print(f"rfisieve run: {line}", file=stream)
            return 2
    for line in cli_night.failed_text(rows, len(paths) if paths else None):
        print(f"rfisieve run: {line}", file=stream)
    if rows:
        return 1
    return 0 if rc == 0 else 2


# -- the steps of ``rfisieve run`` (cmd_run in rfisieve.cli calls them in turn) ----------
def start(cmd, root, args, launch=None):
    """Start Snakemake (``cmd``) in ``root`` with ``launch`` (default subprocess.Popen;
    rfisieve run passes its signal guard's); its stderr is piped unless --verbose or
    --dry-run."""
    import subprocess

    quiet = not (args.dry_run or args.verbose)
    print(f"rfisieve run: starting the workflow in {root} ({args.cores} cores)", file=sys.stderr, flush=True)
    return (launch or subprocess.Popen)(cmd, cwd=str(root), stderr=subprocess.PIPE if quiet else None,
                                        text=True, bufsize=1)


def wait(proc, outdir, args):
    """:func:`follow` with the night's progress shown unless --verbose or --dry-run."""
    return follow(proc, outdir, getattr(args, "night_paths", None) or [],
                  show=not (args.dry_run or args.verbose))


def finish(rc, outdir, args, root, started):
    """The exit status of ``rfisieve run`` after Snakemake's ``rc`` (see :func:`verdict`)."""
    from rfisieve.errors import RfisieveError

    if args.dry_run:
        return 0 if rc == 0 else 2
    run = args.night_run
    status = verdict(outdir, args.night_paths, rc, bands_dir=os.path.join(str(root), run["bands_dir"]),
                     previous=run["previous_run"], since=started - 1, strict=bool(run.get("strict")))
    if status == 2:
        raise RfisieveError(f"the workflow stopped (snakemake exit status {rc}); read the messages above "
                            f"and the logs under {outdir}/logs, fix it and rerun: finished scans are kept")
    print(f"rfisieve run: {'done' if status == 0 else 'finished, with failed scans,'} in "
          f"{time.time() - started:.0f} s", file=sys.stderr)
    for what, rel in (("masks", "flags/<scan>.h5"), ("occupancy", "occupancy/<scan>.csv"),
                      ("run occupancy", "occupancy/run.csv"), ("review page", "report/index.html"),
                      ("failed scans", "failed_scans.csv"), ("logs", "logs/<stage>/<name>.log")):
        path = os.path.join(outdir, rel)
        if os.path.exists(path.split("<")[0]):  # e.g. not after -- --unlock
            print(f"  {what:<14} {path}", file=sys.stderr)
    return status
