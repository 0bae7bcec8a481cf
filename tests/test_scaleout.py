"""Scale-out tried for real (issue 12): a `dask scheduler` and a `dask worker` process on
127.0.0.1, started with the commands the README gives, and the workflow run against
`scheduler: tcp://127.0.0.1:PORT`.  The masks must equal those of the threaded scheduler.
The processes are always shut down."""

import socket
import subprocess

import h5py
import numpy as np
import pytest

from conftest import BIN, ROOT, sha256, tool_env
from scanfactory import make_scan


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _stop(proc):
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture
def dask_cluster(tmp_path):
    """A real dask.distributed scheduler and one worker (2 threads) on 127.0.0.1."""
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    logs = [open(tmp_path / name, "w") for name in ("scheduler.log", "worker.log")]
    dask = str(BIN / "dask")
    procs = [subprocess.Popen([dask, "scheduler", "--host", "127.0.0.1", "--port", str(port),
                               "--no-dashboard"], stdout=logs[0], stderr=subprocess.STDOUT, env=tool_env(),
                              cwd=tmp_path)]
    try:
        procs.append(subprocess.Popen([dask, "worker", address, "--nthreads", "2", "--nworkers", "1",
                                       "--no-dashboard", "--local-directory", str(tmp_path / "dask-worker")],
                                      stdout=logs[1], stderr=subprocess.STDOUT, env=tool_env(), cwd=tmp_path))
        from distributed import Client

        with Client(address, timeout="30s") as client:
            client.wait_for_workers(1, timeout=60)
        yield address
    finally:
        for proc in reversed(procs):
            _stop(proc)
        for fh in logs:
            fh.close()
    assert all(p.poll() is not None for p in procs)


def _run(scans, outdir, scheduler):
    res = subprocess.run([str(BIN / "rfisieve"), "run", "--inputs", *map(str, scans), "--outdir", str(outdir),
                          "--cores", "2", "--set", "chunk_dumps=300", "--set", f"scheduler={scheduler}"],
                         capture_output=True, text=True, env=tool_env(), cwd=ROOT, timeout=900)
    assert res.returncode == 0, res.stderr[-3000:]
    masks = {}
    for scan in scans:
        with h5py.File(outdir / "flags" / scan.name, "r") as f:
            masks[scan.name] = f["flags"][()]
    return masks


@pytest.mark.slow
def test_workflow_on_a_real_dask_cluster_equals_threads(dask_cluster, tmp_path):
    scans = [tmp_path / "qro_a_L.h5", tmp_path / "qro_b_L.h5"]
    make_scan(scans[0], ntime=900, nchan=64, nprod=2, seed=21, cross=True)
    make_scan(scans[1], ntime=700, nchan=48, nprod=2, seed=22, upstream=True)
    before = [sha256(p) for p in scans]
    cluster = _run(scans, tmp_path / "cluster", dask_cluster)
    threads = _run(scans, tmp_path / "threads", "threads")
    for name in threads:
        np.testing.assert_array_equal(cluster[name], threads[name])
        assert threads[name].any()
    assert [sha256(p) for p in scans] == before


def test_readme_gives_the_commands_the_test_runs():
    text = (ROOT / "README.md").read_text()
    assert "dask scheduler --host" in text and "dask worker tcp://" in text
