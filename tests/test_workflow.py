"""End to end: the real Snakemake workflow on a small simulated night.

3 scans (2 in L band, 1 in P), 256 dumps x 64 channels, run by `snakemake` from the
repository root exactly as docs/design.md 3.4 says. Checks the outputs of docs/design.md 3.2-3.3,
that masks and occupancy counts equal the staged engine's (detect, detect, merge, then
counting the mask file), that inputs are untouched, that a killed run resumes without
redoing finished scans, that editing one band's config re-flags only that band's scans,
and that a dask.distributed scheduler gives the same mask as threads.
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
# make_scan puts channels at 1400 MHz + k x 0.5 MHz; a known-bad range over channels 4-5
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


def _config(outdir, scans, bands, workers=1, extra=()):
    glob = scans if str(scans).endswith(".h5") else f"{scans}/*.h5"
    return ["--config", f"inputs={glob}", f"outdir={outdir}", f"bands_dir={bands}", "chunk_dumps=128",
            f"workers={workers}", *extra]


def _snakemake(outdir, scans, bands, *extra, cores=2, workers=1, log=None, ok=True, config=()):
    """Run the workflow from the repository root (or start it, writing to ``log``)."""
    cmd = [sys.executable, "-m", "snakemake", "--cores", str(cores), "--rerun-incomplete", *extra,
           *_config(outdir, scans, bands, workers, config)]
    if log is not None:
        return subprocess.Popen(cmd, cwd=ROOT, env=tool_env(), stdout=open(log, "w"),
                                stderr=subprocess.STDOUT, start_new_session=True)
    res = subprocess.run(cmd, cwd=ROOT, env=tool_env(), stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                         text=True, timeout=300)
    if ok:
        assert res.returncode == 0, res.stdout[-4000:]
    return res if not ok else res.stdout


def _rfisieve_run(outdir, scans, bands, *extra):
    cmd = [sys.executable, "-m", "rfisieve.cli", "run", "--inputs", str(scans), "--outdir", str(outdir),
           "--cores", "2", "--set", f"bands_dir={bands}", "--set", "chunk_dumps=128", "--set", "workers=1",
           *extra]
    return subprocess.run(cmd, cwd=ROOT, env=tool_env(), capture_output=True, text=True, timeout=300)


def _masks(outdir):
    out = {}
    for p in sorted((outdir / "flags").glob("*.h5")):
        with h5py.File(p, "r") as f:
            out[p.stem] = f["flags"][()]
    return out


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
        for rel in (f"flags/{scan}.h5", f"occupancy/{scan}.csv", f"occupancy/{scan}.h5", f"scans/{scan}.json"):
            assert (out / rel).is_file(), rel
    # one flag job per band here (scans of a band share a process): a log and a benchmark each
    assert {p.name for p in (out / "logs" / "flag").glob("*.log")} == {"night-q1..night-q2.log", "night-q3.log"}
    assert {p.name for p in (out / "benchmarks" / "flag").glob("*.tsv")} == {"night-q1..night-q2.tsv",
                                                                            "night-q3.tsv"}
    for rel in ("occupancy/run.csv", "report/index.html", "logs/review/run.log", "benchmarks/review/run.tsv",
                "failed_scans.csv", "logs/verdict/run.ok", "benchmarks/verdict/run.tsv"):
        assert (out / rel).is_file(), rel
    assert not list(out.glob("partial/*.h5")), "partial masks only with keep_partial"
    assert not list((out / "logs" / "flag").glob("*.progress")), "progress files are removed"
    assert "<html" in (out / "report" / "index.html").read_text().lower()
    assert (out / "failed_scans.csv").read_text().splitlines() == ["scan,path,stage,reason"]


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
            # Upstream flags (first 10 dumps) carry the upstream bit; the NaN the invalid bit;
            # the test's known-bad range (channels 4 and 5) the known bit.
            assert np.all(flags[:10] & bits.UPSTREAM)
            assert flags[100, 30, 0] & bits.INVALID
            assert np.all(flags[:, 4:6] & bits.KNOWN) and not np.any(flags[:, 7:] & bits.KNOWN)
            seen |= np.bitwise_or.reduce(flags, axis=None)
    for bit in (bits.UPSTREAM, bits.INVALID, bits.KNOWN, bits.SK, bits.SUMTHRESHOLD):
        assert seen & bit, f"bit value {bit} never set"


def test_masks_and_counts_equal_the_staged_engine(night, tmp_path):
    """The one job per scan gives what the staged path gave (detect sk, detect
    sumthreshold, merge as separate steps; occupancy counted from the mask file)."""
    import rfisieve.engine as engine
    from rfisieve.config import load as config
    from rfisieve.review import counts as rc
    from rfisieve.review import tables

    run = config.load_run_config(None, {"chunk_dumps": 128, "workers": 1})
    for scan, band_name in SCANS.items():
        path = night["scans"] / f"{scan}.h5"
        band, source = config.load_band(night["bands"], band_name)
        parts = []
        for det in engine.DETECTORS:
            parts.append(tmp_path / f"{scan}.{det}.h5")
            engine.detect(path, parts[-1], det, band, run)
        engine.merge(path, parts, tmp_path / f"{scan}.h5", band, run, band_source=source)
        with h5py.File(tmp_path / f"{scan}.h5") as a, h5py.File(night["outdir"] / "flags" / f"{scan}.h5") as b:
            np.testing.assert_array_equal(a["flags"][()], b["flags"][()])
        staged = rc.count_mask_file(tmp_path / f"{scan}.h5")
        got = tables.read_scan_h5(night["outdir"] / "occupancy" / f"{scan}.h5")
        for key, value in staged.items():
            if "/" in key:
                np.testing.assert_array_equal(got[key], value, err_msg=f"{scan} {key}")


def test_occupancy_tables(night):
    out = night["outdir"]
    for scan in SCANS:
        lines = (out / "occupancy" / f"{scan}.csv").read_text().splitlines()
        assert len(lines) == NCHAN + 1  # header + one row per channel (docs/design.md 3.3)
    assert len((out / "occupancy" / "run.csv").read_text().splitlines()) > NCHAN


def test_inputs_are_byte_identical(night):
    assert {p.name: sha256(p) for p in night["scans"].glob("*.h5")} == night["sha256"]


def _planned_scans(text):
    """Scans whose records a dry run would write (from its jobs' output lines)."""
    return set(re.findall(r"/scans/([^/,\s]+)\.json", "\n".join(
        line for line in text.splitlines() if line.strip().startswith("output:"))))


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
    assert _planned_scans(text) == {s for s, b in SCANS.items() if b == "L"}, text[-3000:]
    # With the file as it was, nothing is left to do.
    assert "Nothing to be done" in _snakemake(night["outdir"], night["scans"], night["bands"], "--dry-run")


def _copy_night(night, tmp_path):
    """A copy of the night's outputs and band configs elsewhere: Snakemake has no
    metadata for these output paths (as after a lost .snakemake or another checkout)."""
    import shutil

    outdir, bands = tmp_path / "out", tmp_path / "bands"
    shutil.copytree(night["outdir"], outdir)
    shutil.copytree(night["bands"], bands)
    return outdir, bands


def _edit_keeping_mtime(path, edit):
    """Change a band config's content, then give it back its old mtime (as cp -p, rsync -a)."""
    st = path.stat()
    data = yaml.safe_load(path.read_text())
    edit(data)
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))


def _chi1(data):
    data["sumthreshold"]["chi1"] = 4.0


def _settings_of(mask):
    import json

    with h5py.File(mask, "r") as f:
        return json.loads(f.attrs["band_settings"])


def test_band_file_edited_with_old_mtime_is_redone(night, tmp_path):
    import shutil

    outdir, bands = tmp_path / "out", tmp_path / "bands"
    shutil.copytree(night["bands"], bands)
    _snakemake(outdir, night["scans"], bands)  # a fresh run: Snakemake keeps its metadata
    before = {p.name: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5")}
    _edit_keeping_mtime(bands / "L.yaml", _chi1)
    text = _snakemake(outdir, night["scans"], bands)
    after = {p.name: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5")}
    redone = {name[:-3] for name in before if after[name] != before[name]}
    assert redone == {s for s, b in SCANS.items() if b == "L"}, text[-3000:]
    for scan in redone:
        assert _settings_of(outdir / "flags" / f"{scan}.h5")["sumthreshold"]["chi1"] == 4.0
    assert "Nothing to be done" in _snakemake(outdir, night["scans"], bands, "--dry-run")
    assert {p.name: sha256(p) for p in night["scans"].glob("*.h5")} == night["sha256"]


def test_lost_snakemake_metadata_still_redoes_a_mask_made_with_other_settings(night, tmp_path):
    # The copy has no .snakemake metadata for its paths; its masks were made with chi1 = 8
    # (the test bands' value) and the band config now says 4, with its old mtime.
    outdir, bands = _copy_night(night, tmp_path)
    _edit_keeping_mtime(bands / "L.yaml", _chi1)
    before = {p.name: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5")}
    text = _snakemake(outdir, night["scans"], bands)
    assert "is flagged again: its band config changed" in text
    after = {p.name: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5")}
    assert {n[:-3] for n in before if after[n] != before[n]} == {s for s, b in SCANS.items() if b == "L"}
    for scan, band in SCANS.items():
        chi1 = _settings_of(outdir / "flags" / f"{scan}.h5")["sumthreshold"]["chi1"]
        assert (chi1 == 4.0) == (band == "L")


def _grow(path, extra):
    """Rewrite a scan with ``extra`` more dumps (as a recorder still writing would)."""
    with h5py.File(path, "r") as f:
        data = {k: f[k][()] for k in f}
        attrs = dict(f.attrs)
    with h5py.File(path, "w") as f:
        for k, v in data.items():
            if k in ("data", "flags", "s2"):
                v = np.concatenate([v, v[-extra:]])
            elif k == "time":
                v = np.concatenate([v, v[-1] + (v[1] - v[0]) * np.arange(1, extra + 1)])
            f.create_dataset(k, data=v)
        f.attrs.update(attrs)


def test_scan_grown_after_planning_is_refused_then_redone(night, tmp_path):
    import json
    import shutil

    from rfisieve.config import load as config
    from rfisieve.engine import night as rn

    scans = tmp_path / "scans"
    scans.mkdir()
    scan = scans / "night-q1.h5"
    shutil.copy(night["scans"] / "night-q1.h5", scan)
    run = config.load_run_config(None, {"chunk_dumps": 128, "workers": 1, "bands_dir": str(night["bands"])})
    plan = rn.check_night([scan], run)  # the night is planned ...
    _grow(scan, 64)                      # ... then the scan grows
    outdir = tmp_path / "out"
    expect = {s: {k: e[k] for k in ("shape", "identity", "settings")} for s, e in plan.items()}
    res = subprocess.run([sys.executable, "-m", "rfisieve.cli", "flag", str(scan), "--outdir", str(outdir),
                          "--expect", json.dumps(expect), "--set", f"bands_dir={night['bands']}",
                          "--set", "chunk_dumps=128", "--workers", "1"],
                         cwd=ROOT, env=tool_env(), capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    record = json.loads((outdir / "scans" / "night-q1.json").read_text())
    assert record["status"] == "failed" and record["stage"] == "plan", record
    assert "changed after the night was planned" in record["reason"] and "(256, 64, 2) -> (320, 64, 2)" in \
        record["reason"]
    assert not (outdir / "flags" / "night-q1.h5").exists(), "never flagged with a stale plan"
    # The next run plans the scan as it is now and flags all of it.
    grown = sha256(scan)
    _snakemake(outdir, scans, night["bands"])
    with h5py.File(outdir / "flags" / "night-q1.h5") as f:
        assert f["flags"].shape == (NTIME + 64, NCHAN, 2)
        assert np.any(f["flags"][NTIME:] & bits.DETECTED) or np.any(f["flags"][NTIME:])
    assert json.loads((outdir / "scans" / "night-q1.json").read_text())["status"] == "flagged"
    assert (outdir / "failed_scans.csv").read_text().splitlines() == ["scan,path,stage,reason"]
    assert sha256(scan) == grown


def _bad_night(night, root):
    """Three good scans plus a truncated file, a scan of a band with no config and a
    scan whose /products does not match /data."""
    import shutil

    scans = root / "scans"
    scans.mkdir()
    for name in SCANS:
        shutil.copy(night["scans"] / f"{name}.h5", scans / f"{name}.h5")
    make_scan(scans / "cut-short.h5", ntime=NTIME, nchan=NCHAN, nprod=2, seed=7, band="L")
    blob = (scans / "cut-short.h5").read_bytes()
    (scans / "cut-short.h5").write_bytes(blob[: len(blob) // 2])
    make_scan(scans / "odd-band.h5", ntime=NTIME, nchan=NCHAN, nprod=2, seed=8, band="K7")
    make_scan(scans / "odd-products.h5", ntime=NTIME, nchan=NCHAN, nprod=2, seed=9, band="L")
    with h5py.File(scans / "odd-products.h5", "a") as f:
        del f["products"]
        f["products"] = np.array(["a-a", "b-b", "c-c"], dtype=object)
    return scans


BAD = {"cut-short": "truncated", "odd-band": "no config for band 'K7'", "odd-products": "/products"}


def test_night_with_three_good_scans_a_truncated_file_an_unknown_band_and_mismatched_products(night, tmp_path):
    import csv

    scans = _bad_night(night, tmp_path)
    before = {p.name: sha256(p) for p in scans.glob("*.h5")}
    outdir = tmp_path / "out"
    res = _rfisieve_run(outdir, scans / "*.h5", night["bands"])
    assert res.returncode == 1, res.stderr[-3000:]
    assert "3 of 6 scans failed" in res.stderr
    for name, why in BAD.items():  # each named in the terminal with its one-line reason
        assert re.search(rf"{name} \[check\]: .*{re.escape(why)}", res.stderr), res.stderr
    for scan in SCANS:  # the good scans are flagged, counted and reviewed
        for rel in (f"flags/{scan}.h5", f"occupancy/{scan}.csv", f"occupancy/{scan}.h5"):
            assert (outdir / rel).is_file(), rel
    assert (outdir / "report" / "index.html").is_file() and (outdir / "occupancy" / "run.csv").is_file()
    with open(outdir / "failed_scans.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["scan"] for r in rows] == sorted(BAD)
    for r in rows:
        assert BAD[r["scan"]] in r["reason"] and r["stage"] == "check" and r["path"].endswith(f"{r['scan']}.h5")
        assert "\n" not in r["reason"]
    for name in BAD:
        assert not (outdir / "flags" / f"{name}.h5").exists(), "no partial output of a bad scan"
    # plain snakemake on the same night: the same outputs, and a non-zero exit (the verdict)
    res = _snakemake(outdir, scans, night["bands"], ok=False)
    assert res.returncode != 0 and "3 scans failed" in (outdir / "logs" / "verdict" / "run.log").read_text()
    assert {p.name: sha256(p) for p in scans.glob("*.h5")} == before


def test_strict_stops_at_the_first_bad_scan(night, tmp_path):
    scans = _bad_night(night, tmp_path)
    res = _rfisieve_run(tmp_path / "out", scans / "*.h5", night["bands"], "--strict")
    assert res.returncode != 0
    assert "cut-short.h5" in res.stderr and "truncated" in res.stderr
    assert not list((tmp_path / "out").glob("flags/*.h5")), "strict: nothing flagged"


def test_killed_run_resumes_without_redoing_finished_scans(night, tmp_path):
    # cores=1, workers=1: the L job flags night-q1 then night-q2 in one process; the run
    # is stopped once night-q1 is finished (its record is written last), inside that job.
    outdir = tmp_path / "out"
    log = tmp_path / "first.log"
    proc = _snakemake(outdir, night["scans"], night["bands"], cores=1, log=log)
    first = outdir / "scans" / "night-q1.json"
    try:
        deadline = time.time() + 180
        while time.time() < deadline and not first.exists():
            assert proc.poll() is None, log.read_text()[-3000:]
            time.sleep(0.02)
        # freeze the whole run at once (a loaded machine could otherwise finish the next
        # scan before the signal lands), then stop it as a batch system or Ctrl-C does
        os.killpg(proc.pid, signal.SIGSTOP)
        os.killpg(proc.pid, signal.SIGTERM)
        os.killpg(proc.pid, signal.SIGCONT)
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    done = {outdir / "flags" / "night-q1.h5": (outdir / "flags" / "night-q1.h5").stat().st_mtime_ns}
    assert len(list((outdir / "flags").glob("*.h5"))) < len(SCANS), "the run was to be stopped halfway"
    for p in done:
        with h5py.File(p, "r") as f:  # a mask that looks finished is finished
            assert f["flags"].shape == (NTIME, NCHAN, 3 if "q3" in p.name else 2)
    _snakemake(outdir, night["scans"], night["bands"])
    assert {p: p.stat().st_mtime_ns for p in done} == done, "finished scans were redone"
    assert len(list((outdir / "flags").glob("*.h5"))) == len(SCANS)
    assert (outdir / "report" / "index.html").is_file()
    got, want = _masks(outdir), _masks(night["outdir"])
    assert got.keys() == want.keys()
    for scan in want:  # resumed masks equal the uninterrupted run's
        np.testing.assert_array_equal(got[scan], want[scan])


def test_keep_partial_writes_each_detectors_mask(night, tmp_path):
    scans = tmp_path / "scans"
    scans.mkdir()
    import shutil

    shutil.copy(night["scans"] / "night-q3.h5", scans / "night-q3.h5")
    outdir = tmp_path / "out"
    _snakemake(outdir, scans, night["bands"], config=["keep_partial=true"])
    for det, bit in (("sk", bits.SK), ("sumthreshold", bits.SUMTHRESHOLD)):
        with h5py.File(outdir / "partial" / f"night-q3.{det}.h5") as f:
            assert f.attrs["detector"] == det
            assert not np.any(f["flags"][()] & ~np.uint8(bit | bits.INVALID))
    np.testing.assert_array_equal(_masks(outdir)["night-q3"], _masks(night["outdir"])["night-q3"])


def test_distributed_scheduler_flags_like_threads(night, tmp_path):
    distributed = pytest.importorskip("distributed")
    import rfisieve.engine as engine
    from rfisieve.config import load as config

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


def test_a_killed_flag_job_still_leaves_the_review_of_the_finished_scans(night, tmp_path):
    # One job per scan; night-q2's job is killed (as the kernel's OOM killer would): the
    # run stops non-zero, and rfisieve run writes the review page and failed_scans.csv
    # for the scans that finished, naming night-q2; the next run flags only night-q2.
    import csv

    import psutil

    outdir = tmp_path / "out"
    cmd = [sys.executable, "-m", "rfisieve.cli", "run", "--inputs", f"{night['scans']}/*.h5", "--outdir",
           str(outdir), "--cores", "1", "--set", f"bands_dir={night['bands']}", "--set", "chunk_dumps=128",
           "--set", "workers=1", "--set", "batch_samples=0"]
    proc = subprocess.Popen(cmd, cwd=ROOT, env=tool_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)
    target = str(night["scans"] / "night-q2.h5")
    killed = False
    try:
        deadline = time.time() + 180
        while time.time() < deadline and not killed and proc.poll() is None:
            for p in psutil.process_iter(["cmdline"]):
                cl = p.info["cmdline"] or []
                if len(cl) > 2 and "python" in os.path.basename(cl[0]) and "flag" in cl and target in cl:
                    p.kill()
                    killed = True
                    break
            time.sleep(0.02)
        out, err = proc.communicate(timeout=240)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert killed, err[-3000:]
    assert proc.returncode == 2, err[-3000:]
    assert "night-q2 [flag]: its job did not finish" in err
    with open(outdir / "failed_scans.csv", newline="") as fh:
        assert [(r["scan"], r["stage"]) for r in csv.DictReader(fh)] == [("night-q2", "flag")]
    assert (outdir / "report" / "index.html").is_file() and (outdir / "occupancy" / "run.csv").is_file()
    assert not (outdir / "scans" / "night-q2.json").exists(), "the next run retries it"
    done = {p.name: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5")}
    assert set(done) == {"night-q1.h5", "night-q3.h5"}
    res = _rfisieve_run(outdir, f"{night['scans']}/*.h5", night["bands"])
    assert res.returncode == 0, res.stderr[-3000:]
    assert {p.name: p.stat().st_mtime_ns for p in (outdir / "flags").glob("*.h5") if p.name in done} == done
    assert (outdir / "failed_scans.csv").read_text().splitlines() == ["scan,path,stage,reason"]
    np.testing.assert_array_equal(_masks(outdir)["night-q2"], _masks(night["outdir"])["night-q2"])
