"""End to end: the real Snakemake workflow on a small simulated night.

3 scans (2 in L band, 1 in P), 256 dumps x 64 channels, run by `snakemake` from the
repository root exactly as DESIGN.md 2.4 says. Checks the outputs of DESIGN.md 2.2-2.3,
that inputs are untouched, that a killed run resumes without redoing finished scans,
that editing one band's config re-flags only that band's scans, and that a
dask.distributed scheduler gives the same mask as threads.
"""

import os
import re
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
import yaml

from conftest import ROOT, sha256, tool_env
from rfisieve import bits
from scanfactory import make_scan

pytestmark = pytest.mark.slow

NTIME, NCHAN = 256, 64
SCANS = {"night-q1": "L", "night-q2": "L", "night-q3": "P"}
# make_scan puts channels at 1400 MHz + k x 0.5 MHz; a static range over channels 4-5
# (1402.0-1403.0 MHz) exercises the known bit in both bands.
TEST_STATIC = {"start_mhz": 1401.9, "stop_mhz": 1403.1, "reason": "test range (invented for this test)"}


def _make_night(root):
    scans = root / "scans"
    scans.mkdir(parents=True)
    for i, (name, band) in enumerate(SCANS.items()):
        make_scan(scans / f"{name}.h5", ntime=NTIME, nchan=NCHAN, nprod=2, seed=i, band=band,
                  upstream=True, s2=(i == 1), cross=(i == 2))
        with h5py.File(scans / f"{name}.h5", "a") as f:  # a few invalid samples
            f["data"][100, 30, 0] = np.nan
    bands = root / "bands"
    bands.mkdir()
    for band in set(SCANS.values()):
        data = yaml.safe_load((ROOT / "config" / "bands" / f"{band}.yaml").read_text())
        data["known_bad"].append(dict(TEST_STATIC))
        (bands / f"{band}.yaml").write_text(yaml.safe_dump(data, sort_keys=False))
    return scans, bands


def _snakemake(outdir, scans, bands, *extra, cores=2, workers=1, log=None):
    """Run the workflow from the repository root (or start it, writing to ``log``)."""
    cmd = [sys.executable, "-m", "snakemake", "--cores", str(cores), "--rerun-incomplete", *extra,
           "--config", f"inputs={scans}/*.h5", f"outdir={outdir}", f"bands_dir={bands}",
           "chunk_dumps=128", f"workers={workers}"]
    if log is not None:
        return subprocess.Popen(cmd, cwd=ROOT, env=tool_env(), stdout=open(log, "w"),
                                stderr=subprocess.STDOUT, start_new_session=True)
    res = subprocess.run(cmd, cwd=ROOT, env=tool_env(), stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                         text=True, timeout=240)
    assert res.returncode == 0, res.stdout[-4000:]
    return res.stdout


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    root = tmp_path_factory.mktemp("night")
    scans, bands = _make_night(root)
    before = {p.name: sha256(p) for p in scans.glob("*.h5")}
    outdir = root / "out"
    _snakemake(outdir, scans, bands)
    return {"root": root, "scans": scans, "bands": bands, "outdir": outdir, "sha256": before}


def test_every_output_is_there(night):
    out = night["outdir"]
    for scan in SCANS:
        for rel in (f"flags/{scan}.h5", f"occupancy/{scan}.csv", f"occupancy/{scan}.h5", f"plan/{scan}.json"):
            assert (out / rel).is_file(), rel
        for stage in ("plan", "detect_sk", "detect_sumthreshold", "merge", "occupancy"):
            assert (out / "logs" / stage / f"{scan}.log").is_file()
            assert (out / "benchmarks" / stage / f"{scan}.tsv").is_file()
    for rel in ("occupancy/run.csv", "report/index.html", "logs/review/run.log"):
        assert (out / rel).is_file(), rel
    assert not list((out / "partial").glob("*.h5")), "partial masks are temporary"
    assert "<html" in (out / "report" / "index.html").read_text().lower()


def test_mask_files_follow_the_contract(night):
    seen = 0
    for scan, band in SCANS.items():
        with h5py.File(night["outdir"] / "flags" / f"{scan}.h5", "r") as f, \
                h5py.File(night["scans"] / f"{scan}.h5", "r") as src:
            flags = f["flags"][()]
            assert flags.dtype == np.uint8 and flags.shape == src["data"].shape
            assert f["flags"].chunks is not None and f["flags"].compression is not None
            np.testing.assert_array_equal(f["time"][()], src["time"][()])
            np.testing.assert_array_equal(f["freq"][()], src["freq"][()])
            assert [p.decode() if isinstance(p, bytes) else p for p in f["products"][()]] == \
                   [p.decode() for p in src["products"][()]]
            assert f.attrs["band_config_path"] == str(night["bands"] / f"{band}.yaml")
            assert "rfisieve" in str(dict(f.attrs)) or "version" in " ".join(f.attrs)
            # Upstream flags (first 10 dumps) carry the input bit; the NaN the invalid bit;
            # the test's static range (channels 4 and 5) the static bit.
            assert np.all(flags[:10] & bits.UPSTREAM)
            assert flags[100, 30, 0] & bits.INVALID
            assert np.all(flags[:, 4:6] & bits.KNOWN) and not np.any(flags[:, 7:] & bits.KNOWN)
            seen |= np.bitwise_or.reduce(flags, axis=None)
    for bit in (bits.UPSTREAM, bits.INVALID, bits.KNOWN, bits.SK, bits.SUMTHRESHOLD):
        assert seen & bit, f"bit value {bit} never set"


def test_occupancy_tables(night):
    out = night["outdir"]
    for scan in SCANS:
        lines = (out / "occupancy" / f"{scan}.csv").read_text().splitlines()
        assert len(lines) == NCHAN + 1  # header + one row per channel (DESIGN.md 2.3)
    assert len((out / "occupancy" / "run.csv").read_text().splitlines()) > NCHAN


def test_inputs_are_byte_identical(night):
    assert {p.name: sha256(p) for p in night["scans"].glob("*.h5")} == night["sha256"]


def _planned_jobs(text):
    """(rule, scan) pairs of a dry run's job list."""
    return set(re.findall(r"^rule (\w+):\n(?:    .*\n)*?    wildcards: scan=(\S+)", text, flags=re.M))


def test_band_edit_reflags_only_that_band(night):
    # Snakemake 9 re-runs on a newer input only if its content changed (it keeps input
    # checksums), so the test edits the file rather than touching it.
    band_file = night["bands"] / "L.yaml"
    original, st = band_file.read_bytes(), band_file.stat()
    try:
        edited = yaml.safe_load(original)
        edited["sumthreshold"]["chi1"] = float(edited["sumthreshold"].get("chi1", 6.0)) + 0.5
        band_file.write_text(yaml.safe_dump(edited, sort_keys=False))
        text = _snakemake(night["outdir"], night["scans"], night["bands"], "--dry-run")
    finally:
        band_file.write_bytes(original)
        os.utime(band_file, ns=(st.st_atime_ns, st.st_mtime_ns))
    jobs = _planned_jobs(text)
    redone = {scan for _, scan in jobs}
    assert redone == {s for s, b in SCANS.items() if b == "L"}, text[-3000:]
    for rule in ("plan", "detect_sk", "detect_sumthreshold", "merge", "occupancy"):
        assert {s for r, s in jobs if r == rule} == redone
    # With the file as it was, nothing is left to do.
    assert "Nothing to be done" in _snakemake(night["outdir"], night["scans"], night["bands"], "--dry-run")


def test_killed_run_resumes_without_redoing_finished_scans(night, tmp_path):
    outdir = tmp_path / "out"
    log = tmp_path / "first.log"
    proc = _snakemake(outdir, night["scans"], night["bands"], cores=1, log=log)
    try:
        deadline = time.time() + 180
        # Stop the run once Snakemake has finished the first merge job (a mask is done).
        while time.time() < deadline and "(Rule: merge)" not in log.read_text():
            assert proc.poll() is None, log.read_text()[-3000:]
            time.sleep(0.2)
        os.killpg(proc.pid, signal.SIGTERM)  # as a batch system or Ctrl-C stops a run
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    done = {p: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5")}
    assert 1 <= len(done) < len(SCANS), "the run was to be stopped halfway"
    for p in done:
        with h5py.File(p, "r") as f:  # a mask that looks finished is finished
            assert f["flags"].shape == (NTIME, NCHAN, 3 if "q3" in p.name else 2)
    _snakemake(outdir, night["scans"], night["bands"])
    assert {p: p.stat().st_mtime_ns for p in done} == done, "finished scans were redone"
    assert len(list((outdir / "flags").glob("*.h5"))) == len(SCANS)
    assert (outdir / "report" / "index.html").is_file()
    for scan in SCANS:  # resumed masks equal the uninterrupted run's
        with h5py.File(outdir / "flags" / f"{scan}.h5") as a, \
                h5py.File(night["outdir"] / "flags" / f"{scan}.h5") as b:
            np.testing.assert_array_equal(a["flags"][()], b["flags"][()])


def test_distributed_scheduler_flags_like_threads(night, tmp_path):
    distributed = pytest.importorskip("distributed")
    from rfisieve.config import load as config
    from rfisieve import engine

    scan = night["scans"] / "night-q1.h5"
    band, source = config.load_band(night["bands"], "L")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp",
                                  dashboard_address=None) as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://")
        run = config.load_run_config(None, {"chunk_dumps": 128, "workers": 2, "scheduler": address})
        engine.flag_scan(scan, tmp_path / "dist.h5", band, run, band_source=source)
    run = config.load_run_config(None, {"chunk_dumps": 128, "workers": 2, "scheduler": "threads"})
    engine.flag_scan(scan, tmp_path / "threads.h5", band, run, band_source=source)
    with h5py.File(tmp_path / "dist.h5") as a, h5py.File(tmp_path / "threads.h5") as b:
        np.testing.assert_array_equal(a["flags"][()], b["flags"][()])
        assert np.any(a["flags"][()] & bits.DETECTED)
