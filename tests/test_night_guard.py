"""Unattended nights (issue 12): the outdir lock, Snakemake's stale lock after kill -9,
signals to `rfisieve run`, leftover temporary files, and the memory guard shared by the
jobs that run at once.  Named after the cases; inputs stay byte-identical."""

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time

import h5py
import numpy as np
import psutil
import pytest

from conftest import BIN, ROOT, sha256, tool_env
from rfisieve.cli import guard
from rfisieve.engine import executor
from rfisieve.io import scan as io
from scanfactory import make_scan

HOLD = """
import sys, time
from rfisieve.cli.guard import OutdirLock
lock = OutdirLock(sys.argv[1], sys.argv[2]).acquire()
print("held", flush=True)
time.sleep(float(sys.argv[3]))
"""


def _rfisieve(*args, **kw):
    return subprocess.run([str(BIN / "rfisieve"), *args], capture_output=True, text=True, env=tool_env(),
                          cwd=ROOT, timeout=600, **kw)


def _one_line(res, *words):
    assert res.returncode == 2, (res.stdout, res.stderr[-2000:])
    lines = [ln for ln in res.stderr.strip().splitlines() if ln.startswith("rfisieve: error")]
    assert len(lines) == 1 and "Traceback" not in res.stderr, res.stderr[-2000:]
    for word in words:
        assert word in lines[0], lines[0]
    return lines[0]


def _holder(outdir, checkout="/another/checkout", seconds=60):
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(outdir), checkout, str(seconds)],
                            stdout=subprocess.PIPE, text=True, env=tool_env())
    assert proc.stdout.readline().strip() == "held"
    return proc


def _dead_pid():
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


# -- the outdir lock ---------------------------------------------------------------------
def test_second_run_on_a_locked_outdir_refuses(tmp_path):
    scan = tmp_path / "a_L.h5"
    make_scan(scan, ntime=16, nchan=8, nprod=1)
    before = sha256(scan)
    holder = _holder(tmp_path / "out")
    try:
        res = _rfisieve("run", "--inputs", str(scan), "--outdir", str(tmp_path / "out"), "--cores", "1")
        _one_line(res, str(tmp_path / "out"), f"pid {holder.pid} on this host", "/another/checkout")
        assert not (tmp_path / "out" / "flags").exists()
    finally:
        holder.kill()
        holder.wait()
    assert sha256(scan) == before


def test_stale_lock_from_a_dead_process_on_this_host_is_cleared(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    dead = _dead_pid()
    (out / guard.LOCK_NAME).write_text(json.dumps({"host": socket.gethostname(), "pid": dead,
                                                   "started_utc": "2026-01-01T00:00:00Z"}))
    with guard.OutdirLock(out) as lock:
        assert lock.stale["pid"] == dead
        record = json.loads((out / guard.LOCK_NAME).read_text())
        assert record["pid"] == os.getpid() and record["host"] == socket.gethostname()
    assert not (out / guard.LOCK_NAME).exists()  # released


def test_lock_of_another_host_is_never_taken_over(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / guard.LOCK_NAME).write_text(json.dumps({"host": "elsewhere-node-7", "pid": 1234,
                                                   "started_utc": "2026-01-01T00:00:00Z"}))
    with pytest.raises(guard.OutdirLocked, match="another host.*elsewhere-node-7.*remove"):
        guard.OutdirLock(out).acquire()
    assert "elsewhere-node-7" in (out / guard.LOCK_NAME).read_text()


def test_a_live_lock_is_never_cleared(tmp_path):
    holder = _holder(tmp_path)
    try:
        with pytest.raises(guard.OutdirLocked, match=f"pid {holder.pid}"):
            guard.OutdirLock(tmp_path).acquire()
        assert json.loads((tmp_path / guard.LOCK_NAME).read_text())["pid"] == holder.pid
    finally:
        holder.kill()
        holder.wait()


# -- Snakemake's lock ------------------------------------------------------------------
def _snakemake_lock(checkout):
    locks = checkout / ".snakemake" / "locks"
    locks.mkdir(parents=True)
    (locks / "0.output.lock").write_text("/some/outdir/flags/a.h5\n")
    return locks


def test_stale_snakemake_lock_is_cleared_when_no_snakemake_runs(tmp_path):
    locks = _snakemake_lock(tmp_path)
    assert guard.clear_stale_snakemake_lock(tmp_path) == "cleared"
    assert not any(locks.iterdir())
    assert guard.clear_stale_snakemake_lock(tmp_path) is None


def test_live_snakemake_lock_is_left_alone(tmp_path):
    locks = _snakemake_lock(tmp_path)
    fake = tmp_path / "bin" / "snakemake"  # a process that looks like snakemake, running here
    fake.parent.mkdir()
    fake.symlink_to(shutil.which("sleep"))
    proc = subprocess.Popen([str(fake), "30"], cwd=tmp_path)
    try:
        deadline = time.time() + 10  # until the child has exec'd (before that it is a Python fork)
        while guard.snakemake_processes_in(tmp_path) != [proc.pid] and time.time() < deadline:
            time.sleep(0.02)
        assert guard.snakemake_processes_in(tmp_path) == [proc.pid]
        assert guard.clear_stale_snakemake_lock(tmp_path) == "live"
        assert (locks / "0.output.lock").exists()
    finally:
        proc.kill()
        proc.wait()


# -- leftovers ---------------------------------------------------------------------------
def test_leftover_temp_files_are_removed(tmp_path):
    (tmp_path / "flags").mkdir()
    keep = [tmp_path / "flags" / "a.h5", tmp_path / "flags" / ".notes", tmp_path / "x.partial.h5"]
    gone = [tmp_path / "flags" / ".a.h5.partial.k2j3", tmp_path / ".run.csv.partial.zz.png",
            tmp_path / "flags" / ".b.h5.q1w2.partial"]  # the last: older temp names
    for p in keep + gone:
        p.write_bytes(b"x")
    assert sorted(guard.remove_leftovers(tmp_path)) == sorted(gone)
    assert all(p.exists() for p in keep) and not any(p.exists() for p in gone)


def test_atomic_output_temp_names_are_found_as_leftovers(tmp_path):
    with io.atomic_output(tmp_path / "m.h5") as tmp:
        tmp.write_bytes(b"x")
        assert io.remove_partials(tmp_path) == [tmp]  # what a killed run would leave
        tmp.write_bytes(b"y")
    assert (tmp_path / "m.h5").read_bytes() == b"y" and io.remove_partials(tmp_path) == []


# -- the memory guard ---------------------------------------------------------------------
def test_memory_budget_is_shared_by_the_jobs_at_once():
    # MEMORY_SHARE of the machine, divided by the jobs at once (the definition).
    total = 24 * 2 ** 30
    assert executor.memory_budget(1, total) == 0.25 * total
    assert executor.memory_budget(4, total) == 0.25 * total / 4
    assert guard.jobs_at_once(8, {"workers": 2, "scheduler": "threads"}) == 4
    assert guard.jobs_at_once(8, {"workers": 2, "scheduler": "tcp://127.0.0.1:8786"}) == 8
    assert guard.jobs_at_once(1, {"workers": 4, "scheduler": "threads"}) == 1


def test_memory_advice_arithmetic(tmp_path):
    path = tmp_path / "a_L.h5"
    make_scan(path, ntime=64, nchan=32, nprod=2)
    with io.open_scan(path) as scan:
        per_dump = 32 * 2 * (4 + executor.WORK_BYTES)  # float32 data, no /flags, no /s2
        assert executor.chunk_cost(scan) == per_dump
        halo = 300
        total = 2 * (4096 + 2 * halo) * per_dump * 4 / 0.25  # exactly enough for 4 jobs
        assert executor.memory_advice(scan, 4096, halo, jobs=4, total=total) is None
        text = executor.memory_advice(scan, 4096, halo, jobs=8, total=total)
        assert text.startswith(f"{path}: ") and "shared by 8 jobs at once" in text
        fit = int(text.split("set chunk_dumps to at most ")[1])
        budget = executor.memory_budget(8, total)
        assert 2 * (fit + 2 * halo) * per_dump <= budget < 2 * (fit + 1 + 2 * halo) * per_dump
        assert executor.memory_advice(scan, fit, halo, jobs=8, total=total) is None
        assert "even a chunk of one dump" in executor.memory_advice(scan, 10, halo, jobs=10 ** 6, total=total)


def test_memory_guard_refuses_in_one_line_with_the_advice(tmp_path):
    path = tmp_path / "a_L.h5"
    make_scan(path, ntime=64, nchan=32, nprod=2)
    res = _rfisieve("detect", str(path), "--detector", "sk", "--out", str(tmp_path / "p.h5"),
                    "--jobs-at-once", str(10 ** 9))
    _one_line(res, str(path), "shared by 1000000000 jobs at once")
    assert not (tmp_path / "p.h5").exists()


def test_memory_advice_is_shown_in_the_terminal(tmp_path, capsys):
    from rfisieve.config.defaults import run_settings

    path = tmp_path / "a_L.h5"
    make_scan(path, ntime=64, nchan=32, nprod=2)
    run = run_settings({"workers": 1})
    assert guard.memory_advice([path], run, ROOT / "config" / "bands", cores=2) == []
    shown = guard.memory_advice([path, tmp_path / "missing.h5"], run, ROOT / "config" / "bands", cores=10 ** 9)
    err = capsys.readouterr().err.splitlines()
    assert len(shown) == 1 and err == [f"rfisieve run: warning: {shown[0]}"]
    assert "shared by 1000000000 jobs at once" in err[0]


# -- real runs ------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def night(tmp_path_factory):
    """A scan that takes the workflow several seconds (time to act while it runs)."""
    d = tmp_path_factory.mktemp("guardnight")
    scan = d / "slow_L.h5"
    make_scan(scan, ntime=12000, nchan=256, nprod=2, lines=False, seed=2)
    return scan


def _start_run(scan, outdir, *extra):
    return subprocess.Popen([str(BIN / "rfisieve"), "run", "--inputs", str(scan), "--outdir", str(outdir),
                             "--cores", "2", "--set", "chunk_dumps=2048", *extra], cwd=ROOT, env=tool_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)


def _wait_for_detect(proc, timeout=120):
    """The run's descendants once a detect job runs."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        assert proc.poll() is None, proc.communicate()
        kids = psutil.Process(proc.pid).children(recursive=True)
        with_cmd = []
        for k in kids:
            try:
                with_cmd.append((k, " ".join(k.cmdline())))
            except psutil.Error:
                continue
        if any(" detect " in c or " flag " in c for _, c in with_cmd):  # the job that flags a scan
            time.sleep(0.5)
            return [k for k, _ in with_cmd]
        time.sleep(0.1)
    raise AssertionError("no detect job started")


def _alive(procs):
    out = []
    for p in procs:
        try:
            if p.is_running() and p.status() != psutil.STATUS_ZOMBIE:
                out.append(p)
        except psutil.NoSuchProcess:
            pass
    return out


def _masks(outdir):
    with h5py.File(outdir / "flags" / "slow_L.h5", "r") as f:
        return f["flags"][()]


@pytest.fixture(scope="module")
def reference(night, tmp_path_factory):
    out = tmp_path_factory.mktemp("ref") / "out"
    res = _rfisieve("run", "--inputs", str(night), "--outdir", str(out), "--cores", "2", "--set", "chunk_dumps=2048")
    assert res.returncode == 0, res.stderr[-2000:]
    return _masks(out)


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_signal_stops_snakemake_and_its_jobs_no_orphan(night, reference, tmp_path, sig):
    before = sha256(night)
    proc = _start_run(night, tmp_path / "out")
    family = _wait_for_detect(proc)
    os.kill(proc.pid, sig)
    _, err = proc.communicate(timeout=180)
    assert proc.returncode == 128 + sig, err[-2000:]
    assert f"interrupted by {sig.name}" in err
    deadline = time.monotonic() + 30
    while _alive(family) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not _alive(family), [" ".join(p.cmdline()) for p in _alive(family)]
    # the next run finishes the night, with the masks of an uninterrupted run
    res = _rfisieve("run", "--inputs", str(night), "--outdir", str(tmp_path / "out"), "--cores", "2",
                    "--set", "chunk_dumps=2048")
    assert res.returncode == 0, res.stderr[-2000:]
    np.testing.assert_array_equal(_masks(tmp_path / "out"), reference)
    assert sha256(night) == before


@pytest.mark.slow
def test_kill_9_of_rfisieve_run_leaves_no_orphan(night, tmp_path):
    proc = _start_run(night, tmp_path / "out")
    family = _wait_for_detect(proc)
    os.kill(proc.pid, signal.SIGKILL)  # rfisieve run itself cannot catch this
    proc.communicate(timeout=60)
    deadline = time.monotonic() + 60  # snakemake gets SIGINT when its parent dies, and stops its jobs
    while _alive(family) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not _alive(family), [" ".join(p.cmdline()) for p in _alive(family)]


@pytest.mark.slow
def test_after_kill_9_the_next_run_proceeds(night, reference, tmp_path):
    before = sha256(night)
    out = tmp_path / "out"
    proc = _start_run(night, out)
    family = _wait_for_detect(proc)
    smk = next(p for p in family if "snakemake" in " ".join(p.cmdline()[:3]))
    os.killpg(smk.pid, signal.SIGKILL)  # snakemake and its jobs, as the OOM killer or a power cut would
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=60)
    assert any((ROOT / ".snakemake" / "locks").iterdir())  # Snakemake's lock is left behind
    (out / "flags").mkdir(exist_ok=True)
    leftover = out / "flags" / ".slow_L.h5.partial.x7k2"  # what a killed writer leaves
    leftover.write_bytes(b"half a mask")
    res = _rfisieve("run", "--inputs", str(night), "--outdir", str(out), "--cores", "2", "--set", "chunk_dumps=2048")
    assert res.returncode == 0, res.stderr[-3000:]
    assert f"removed the stale lock of {out}" in res.stderr
    assert "cleared Snakemake's stale lock" in res.stderr
    import re

    assert re.search(r"removed \d+ temporary files? left by an interrupted run", res.stderr)
    assert not leftover.exists() and not list(out.rglob(".*.partial*"))
    np.testing.assert_array_equal(_masks(out), reference)
    assert sha256(night) == before


@pytest.mark.slow
def test_two_concurrent_runs_on_one_outdir_from_two_checkouts_the_second_refuses(night, reference, tmp_path):
    before = sha256(night)
    out = tmp_path / "out"
    other = tmp_path / "checkout2"  # a second checkout of the workflow (the package is the same)
    other.mkdir()
    shutil.copy(ROOT / "Snakefile", other / "Snakefile")
    shutil.copytree(ROOT / "workflow", other / "workflow")
    shutil.copytree(ROOT / "config", other / "config")
    first = _start_run(night, out)
    try:
        _wait_for_detect(first)
        res = subprocess.run([sys.executable, "-m", "snakemake", "--snakefile", str(other / "Snakefile"),
                              "--directory", str(other), "--cores", "1", "--config", f"inputs={night}",
                              f"outdir={out}"], capture_output=True, text=True, env=tool_env(), timeout=300)
        line = _one_line(res, str(out), "another run is using this output directory", f"pid {first.pid}")
        assert str(ROOT) in line  # the holder's checkout is named
        assert not (other / ".snakemake" / "locks").exists() or not any((other / ".snakemake" / "locks").iterdir())
        res = _rfisieve("run", "--inputs", str(night), "--outdir", str(out), "--cores", "1")
        _one_line(res, "another run is using this output directory")
    finally:
        _, err = first.communicate(timeout=600)
    assert first.returncode == 0, err[-2000:]
    np.testing.assert_array_equal(_masks(out), reference)
    assert sha256(night) == before


@pytest.mark.slow
def test_unlock_prints_no_review_page_that_does_not_exist(night, tmp_path):
    res = _rfisieve("run", "--inputs", str(night), "--outdir", str(tmp_path / "fresh"), "--", "--unlock")
    assert res.returncode == 0, res.stderr[-2000:]
    assert "index.html" not in res.stderr and "report" not in res.stderr


def test_snakemake_as_rfisieve_run_starts_it_exits_as_snakemake_does(tmp_path):
    """rfisieve run starts Snakemake through rfisieve.cli.snakemake_process, which only
    skips Python's shutdown: the output and exit status are plain snakemake's (the
    reference: `python -m snakemake` itself, run beside it)."""
    from rfisieve.cli.snakemake_process import MODULE

    for args in (["--version"], ["--no-such-option"], ["--snakefile", str(tmp_path / "none"), "--cores", "1"]):
        ref = subprocess.run([sys.executable, "-m", "snakemake", *args], cwd=tmp_path,
                             capture_output=True, text=True, timeout=120)
        got = subprocess.run([sys.executable, "-m", MODULE, *args], cwd=tmp_path,
                             capture_output=True, text=True, timeout=120)
        assert got.returncode == ref.returncode, args
        assert got.stdout == ref.stdout, args
    assert ref.returncode != 0 and "none" in got.stderr  # the missing Snakefile is named


def test_snakemake_started_by_rfisieve_run_counts_as_live(tmp_path):
    from rfisieve.cli.snakemake_process import MODULE

    fake = tmp_path / "bin" / MODULE  # a process whose command line names the module, running here
    fake.parent.mkdir()
    fake.symlink_to(shutil.which("sleep"))
    proc = subprocess.Popen([str(fake), "30"], cwd=tmp_path)
    try:
        deadline = time.time() + 10
        while guard.snakemake_processes_in(tmp_path) != [proc.pid] and time.time() < deadline:
            time.sleep(0.02)
        assert guard.snakemake_processes_in(tmp_path) == [proc.pid]
    finally:
        proc.kill()
