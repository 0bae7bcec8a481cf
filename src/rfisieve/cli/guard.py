"""Safety of an unattended night: the outdir lock, Snakemake's stale lock, leftover
temporary files, signals, and the memory advice shown before a run starts.

The outdir lock
---------------
A run holds ``<outdir>/.rfisieve-run.lock`` for its whole life: an exclusive
``flock`` on that file, which names the holder (host, pid, start time, checkout,
command).  A second run on the same outdir, from any checkout (``rfisieve run``, or
plain ``snakemake``: the Snakefile takes the same lock), refuses in one line naming
the holder.  The kernel drops a ``flock`` when its process dies, even by SIGKILL, so a
lock left by a dead process on this host is found free; the next run then says whose
it was and takes it.  A lock that names another host is never taken over: its holder
cannot be checked from here (remove the file by hand when that run is known dead).

Snakemake's own lock
--------------------
Snakemake keeps ``.snakemake/locks/`` in the checkout while it runs and deletes it when
it stops; after ``kill -9`` the lock stays and every retry fails.  :func:`clear_stale_snakemake_lock`
removes it only when no snakemake process runs in that checkout (never a live lock).

Signals
-------
:class:`ChildGuard` starts Snakemake in a session of its own and forwards SIGINT,
SIGTERM and SIGHUP to it as SIGINT (Snakemake then cancels its running jobs, and marks
their outputs incomplete so that the next run redoes them).  If it has not stopped
after :data:`GRACE_S` seconds, its whole process group gets SIGTERM, then SIGKILL.  On
Linux the child also gets SIGINT when ``rfisieve run`` itself dies (even by SIGKILL),
so no Snakemake is ever left orphaned.
"""

import contextlib
import datetime
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

from rfisieve.errors import RfisieveError

#: The outdir lock's file name.
LOCK_NAME = ".rfisieve-run.lock"

#: Seconds Snakemake gets to stop its jobs after a signal, before its group is killed.
GRACE_S = 60.0

_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


def say(message):
    """One line on stderr, as ``rfisieve run: ...``."""
    print(f"rfisieve run: {message}", file=sys.stderr, flush=True)


class OutdirLocked(RfisieveError):
    """Another run holds the outdir lock."""


def _now_utc():
    return datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _describe(holder):
    host = holder.get("host", "?")
    where = "this host" if host == socket.gethostname() else f"host {host}"
    text = f"pid {holder.get('pid', '?')} on {where}, started {holder.get('started_utc', '?')}"
    if holder.get("checkout"):
        text += f", checkout {holder['checkout']}"
    return text


class OutdirLock:
    """The exclusive lock of one outdir (see the module notes); a context manager.

    Parameters
    ----------
    outdir : path
        The run's output directory (created if missing).
    checkout : path, optional
        The repository checkout the run comes from (recorded for the message).
    allow_parent : bool
        Taken by the Snakemake that ``rfisieve run`` started: the lock held by the
        parent process counts as its own.
    """

    def __init__(self, outdir, checkout=None, allow_parent=False):
        self.outdir = Path(outdir).resolve()
        self.path = self.outdir / LOCK_NAME
        self.checkout = str(checkout) if checkout else None
        self.allow_parent = allow_parent
        self.fd = None
        self.stale = None  # the dead holder whose lock was taken over, if any

    def acquire(self):
        import fcntl

        self.outdir.mkdir(parents=True, exist_ok=True)
        for _ in range(10):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _read_holder(fd)
                os.close(fd)
                if self.allow_parent and holder.get("pid") == os.getppid() \
                        and holder.get("host") == socket.gethostname():
                    return self  # rfisieve run, our parent, holds it for us
                raise OutdirLocked(f"{self.outdir}: another run is using this output directory "
                                   f"({_describe(holder)}); wait for it to finish, or use another outdir") from None
            try:
                same = os.stat(self.path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if not same:  # released and removed between our open and flock: try again
                os.close(fd)
                continue
            holder = _read_holder(fd)
            if holder and holder.get("host") not in (None, socket.gethostname()):
                os.close(fd)
                raise OutdirLocked(f"{self.outdir}: locked by a run on another host ({_describe(holder)}); "
                                   f"it cannot be checked from here: if that run is gone, remove {self.path}")
            if holder.get("pid"):
                self.stale = holder
            record = {"host": socket.gethostname(), "pid": os.getpid(), "started_utc": _now_utc(),
                      "checkout": self.checkout, "command": " ".join(sys.argv)}
            os.ftruncate(fd, 0)
            os.pwrite(fd, (json.dumps(record) + "\n").encode(), 0)
            os.fsync(fd)
            self.fd = fd
            return self
        raise OutdirLocked(f"{self.path}: the lock keeps changing hands; is another run starting?")

    def release(self):
        if self.fd is None:
            return
        with contextlib.suppress(FileNotFoundError):
            if os.stat(self.path).st_ino == os.fstat(self.fd).st_ino:
                os.unlink(self.path)  # while still holding it: a waiter then retries on a new file
        os.close(self.fd)
        self.fd = None

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
        return False


def _read_holder(fd):
    try:
        data = os.pread(fd, 4096, 0).decode("utf-8", "replace").strip()
        return json.loads(data) if data else {}
    except (OSError, ValueError):
        return {}


def hold_outdir_lock_for_snakemake(outdir, checkout, unlock_snakemake=None):
    """Take the outdir lock for the life of this Snakemake process (the Snakefile's
    ``onstart``); a lock that ``rfisieve run`` (the parent) holds counts as ours.

    When another run holds it: one line, Snakemake's own lock released
    (``unlock_snakemake``), and exit status 2 before any job starts.
    """
    try:
        lock = OutdirLock(outdir, checkout, allow_parent=True).acquire()
    except OutdirLocked as err:
        print(f"rfisieve: error: {err}", file=sys.stderr, flush=True)
        if unlock_snakemake is not None:
            unlock_snakemake()
        os._exit(2)  # from Snakemake's onstart: no traceback, and no job started
    if lock.stale:
        print(f"rfisieve: removed the stale lock of {lock.outdir} (held by {_describe(lock.stale)}, "
              "no longer running)", file=sys.stderr, flush=True)
    _HELD.append(lock)  # released by the kernel when snakemake exits
    return lock


_HELD = []


# -- Snakemake's lock -------------------------------------------------------------
def snakemake_processes_in(checkout):
    """PIDs of snakemake processes whose working directory is ``checkout`` (other than us).

    A process whose directory cannot be read counts (never clear a lock that might be live).
    """
    import psutil

    from rfisieve.cli.snakemake_process import MODULE

    names = ("snakemake", MODULE)  # plain snakemake, or as rfisieve run starts it
    root = os.path.realpath(checkout)
    found = []
    for proc in psutil.process_iter(["pid", "cmdline"]):
        try:
            cmd = proc.info["cmdline"] or []
            if proc.pid == os.getpid() or not any(os.path.basename(c) in names for c in cmd[:3]):
                continue
            directory = None
            for flag in ("--directory", "-d"):
                if flag in cmd[:-1]:
                    directory = cmd[cmd.index(flag) + 1]
            try:
                cwd = proc.cwd()
            except psutil.AccessDenied:
                found.append(proc.pid)
                continue
            where = os.path.realpath(os.path.join(cwd, directory) if directory else cwd)
            if where == root:
                found.append(proc.pid)
        except (psutil.NoSuchProcess, psutil.ZombieProcess):
            continue
    return found


def clear_stale_snakemake_lock(checkout):
    """Remove ``<checkout>/.snakemake/locks`` when no snakemake runs in ``checkout``.

    Returns "cleared", "live" (left alone: a snakemake runs there) or None (no lock).
    """
    locks = Path(checkout) / ".snakemake" / "locks"
    if not locks.is_dir() or not any(locks.iterdir()):
        return None
    live = snakemake_processes_in(checkout)
    if live:
        say(f"snakemake (pid {', '.join(map(str, live))}) is running in {checkout}: its lock is left alone")
        return "live"
    for path in locks.iterdir():
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
    say(f"cleared Snakemake's stale lock in {locks} (left by a run that was killed; no snakemake "
        "runs in this checkout now)")
    return "cleared"


# -- leftovers ---------------------------------------------------------------------
def remove_leftovers(outdir):
    """Remove hidden temporary files of outputs that killed runs left in ``outdir``."""
    from rfisieve.io.atomic import remove_partials

    removed = remove_partials(outdir)
    if removed:
        say(f"removed {len(removed)} temporary file{'s' if len(removed) != 1 else ''} left by an "
            f"interrupted run in {outdir}")
    return removed


# -- signals -----------------------------------------------------------------------
def _die_with_parent():  # pragma: no cover - runs in the child between fork and exec
    """preexec_fn: on Linux, SIGINT to this process when its parent dies."""
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGINT)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


class ChildGuard:
    """Start a child (Snakemake) in its own session and stop it cleanly on a signal.

    Use as ``with ChildGuard() as guard: proc = guard.start(cmd, cwd=...); ...``.  While
    the block runs, SIGINT, SIGTERM and SIGHUP are forwarded to the child as SIGINT; the
    child's process group is killed if it does not stop within ``grace`` seconds.
    ``guard.signal`` is the first signal received (None if none).
    """

    def __init__(self, grace=GRACE_S):
        self.grace = grace
        self.proc = None
        self.signal = None
        self._old = {}
        self._timer = None

    def start(self, cmd, **kwargs):
        preexec = _die_with_parent if sys.platform.startswith("linux") else None
        self.proc = subprocess.Popen(cmd, start_new_session=True, preexec_fn=preexec, **kwargs)
        return self.proc

    def _handler(self, signum, frame):
        first = self.signal is None
        if first:
            self.signal = signum
        proc = self.proc
        if proc is None or proc.poll() is not None:
            return
        if first:
            say(f"got {signal.Signals(signum).name}: stopping snakemake and its jobs (finished scans are kept; "
                "run the same command again to finish the night)")
            with contextlib.suppress(ProcessLookupError):
                proc.send_signal(signal.SIGINT)
            self._timer = threading.Timer(self.grace, self._escalate)
            self._timer.daemon = True
            self._timer.start()
        else:  # a second signal: do not wait any longer
            self._escalate()

    def _escalate(self):
        proc = self.proc
        for sig in (signal.SIGTERM, signal.SIGKILL):
            if proc.poll() is not None:
                return
            say(f"snakemake did not stop: sending {signal.Signals(sig).name} to its process group")
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(proc.pid, sig)
            deadline = time.monotonic() + 5
            while proc.poll() is None and time.monotonic() < deadline:
                time.sleep(0.1)

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for sig in _SIGNALS:
                self._old[sig] = signal.signal(sig, self._handler)
        return self

    def __exit__(self, *exc):
        if self.proc is not None and self.proc.poll() is None:  # an error in the block
            with contextlib.suppress(ProcessLookupError):
                self.proc.send_signal(signal.SIGINT)
            try:
                self.proc.wait(self.grace)
            except subprocess.TimeoutExpired:
                self._escalate()
        if self._timer is not None:
            self._timer.cancel()
        for sig, old in self._old.items():
            signal.signal(sig, old)
        return False

    def check(self):
        """Raise the one-line 'interrupted' error when a signal stopped the run."""
        if self.signal is not None:
            name = signal.Signals(self.signal).name
            raise Interrupted(f"interrupted by {name}; run the same command again to finish the run "
                              "(finished scans are kept)", 128 + int(self.signal))


class Interrupted(RfisieveError):
    """The run was stopped by a signal; ``status`` is 128 + the signal number."""

    def __init__(self, message, status):
        super().__init__(message)
        self.status = status


# -- memory advice -------------------------------------------------------------------
def jobs_at_once(cores, run):
    """Detect jobs Snakemake runs at once on this machine: ``cores // workers`` (one core
    per job when the chunks run on a dask.distributed cluster)."""
    threads = 1 if str(run.get("scheduler", "")).startswith("tcp://") else max(1, int(run.get("workers") or 1))
    return max(1, int(cores) // threads)


def memory_advice(paths, run, bands_dir, cores):
    """Show in the terminal, before the night starts, each scan whose chunks would not fit
    in a job's share of memory (the advice the detect job would otherwise give only in
    its log).  Scans that cannot be read are left to the workflow, which reports them."""
    from rfisieve.config import load as config
    from rfisieve.engine.executor import memory_advice as advice_for
    from rfisieve.engine.plan import detect_halo, merge_halo
    from rfisieve.errors import RfisieveError as _Error
    from rfisieve.io import scan as io

    jobs = jobs_at_once(cores, run)
    shown = []
    for path in paths:
        try:
            with io.open_scan(path, run.get("layout")) as scan:
                band, _ = config.load_band(bands_dir, scan.band)
                chunk = min(int(run["chunk_dumps"]), max(b - a for a, b in scan.segments))
                text = advice_for(scan, chunk, detect_halo(band, scan) + merge_halo(band), jobs)
        except (_Error, OSError):
            continue
        if text:
            say(f"warning: {text}")
            shown.append(text)
    return shown
