"""The night's pieces without Snakemake: checks, jobs, provenance, the flag job's counts.

Check values come from the definitions: a mask's occupancy counts are those of its
own /flags (counted again from the file, brute-force tests in test_occupancy.py); the
masks are the staged engine's (detect, detect, merge).
"""

import json
import shutil

import h5py
import numpy as np
import pytest

from conftest import ROOT, sha256
from rfisieve import bits
from rfisieve.config import load as config
from rfisieve.engine import night
from scanfactory import make_scan


def _run(tmp_path, **over):
    values = {"chunk_dumps": 64, "workers": 1, "bands_dir": str(ROOT / "config" / "bands")}
    values.update(over)
    return config.load_run_config(None, values)


def test_jobs_group_scans_of_a_band_up_to_the_sample_budget():
    e = {f"s{i}": {"band": "L" if i < 5 else "S", "shape": [100, 10, 2]} for i in range(7)}
    e["bad"] = {"band": None, "shape": None}
    jobs = night.batches(e, samples_per_job=4000)
    assert jobs == {"s0": ["s0", "s1"], "s2": ["s2", "s3"], "s4": ["s4"], "s5": ["s5", "s6"], "bad": ["bad"]}
    assert all(len(v) == 1 for v in night.batches(e, samples_per_job=0).values())


def test_small_scans_go_into_one_core_jobs_of_even_counts_apart_from_large_ones():
    # 30 scans of one chunk: ceil(30 / 12) = 3 jobs of 10, each on one core; the long scan
    # (more dumps than a chunk) and the wide one (more samples than a small scan) keep
    # jobs of `workers` cores; the sample budget still bounds the small jobs
    e = {f"s{i:02d}": {"band": "L", "shape": [64, 16, 2]} for i in range(30)}
    e["long"] = {"band": "L", "shape": [65, 16, 2]}
    e["wide"] = {"band": "L", "shape": [64, 1 << 18, 2]}
    jobs = night.batches(e, samples_per_job=1 << 30, small_dumps=64)
    small = [v for v in jobs.values() if v[0].startswith("s")]
    assert [len(v) for v in small] == [10, 10, 10]
    assert sorted(s for v in small for s in v) == sorted(s for s in e if s.startswith("s"))
    assert jobs["long"] == ["long", "wide"]
    assert all(night.batch_threads(e, v, 2, 64) == 1 for v in small)
    assert night.batch_threads(e, jobs["long"], 2, 64) == 2
    assert [len(v) for v in night.batches(e, samples_per_job=64 * 16 * 2 * 5, small_dumps=64).values()][:6] == [5] * 6
    assert all(len(v) == 1 for v in night.batches(e, samples_per_job=0, small_dumps=64).values())


def test_check_quarantines_each_bad_scan_with_a_one_line_reason(tmp_path):
    good, noband = tmp_path / "good.h5", tmp_path / "odd.h5"
    make_scan(good, ntime=64, nchan=16, nprod=1)
    make_scan(noband, ntime=64, nchan=16, nprod=1, band="Q9")
    entries = night.check_night([good, noband], _run(tmp_path))
    assert entries["good"]["problem"] is None and entries["good"]["shape"] == [64, 16, 1]
    p = entries["odd"]["problem"]
    assert p["stage"] == "check" and "no config for band 'Q9'" in p["reason"] and "\n" not in p["reason"]
    with pytest.raises(Exception, match="Q9"):
        night.check_night([good, noband], _run(tmp_path), strict=True)


def _hot_channel_scan(path):
    """A scan whose channel 10 carries strong interference in 90 % of its dumps, so the
    per-channel cut (limit 0.8) adds the other 10 % after the mask is written."""
    make_scan(path, ntime=200, nchan=32, nprod=2, seed=3)
    with h5py.File(path, "a") as f:
        d = f["data"][()]
        d[20:, 10, :] *= 3.0
        f["data"][...] = d


@pytest.mark.parametrize("hot", [False, True], ids=["no-cut", "channel-cut"])
def test_flag_job_counts_equal_the_mask_files_own_counts(tmp_path, hot):
    from rfisieve.cli.night import flag_scans
    from rfisieve.review import counts, tables

    scan = tmp_path / "scans" / "s.h5"
    scan.parent.mkdir()
    if hot:
        _hot_channel_scan(scan)
    else:
        make_scan(scan, ntime=200, nchan=32, nprod=2, seed=3)
    before = sha256(scan)
    outdir = tmp_path / "out"
    rec, = flag_scans([scan], outdir, _run(tmp_path))
    assert rec["status"] == "flagged", rec
    with h5py.File(outdir / "flags" / "s.h5") as f:
        cut_channel = bool(np.all(f["flags"][:, 10, :] != 0)) and bool(np.any(f["flags"][:, 10, :] == bits.CUT))
    assert cut_channel == hot
    want = counts.count_mask_file(outdir / "flags" / "s.h5")
    got = tables.read_scan_h5(outdir / "occupancy" / "s.h5")
    for key, value in want.items():
        if "/" in key:
            np.testing.assert_array_equal(got[key], value, err_msg=key)
    assert sha256(scan) == before


def _with_bad_samples(path):
    """NaN, zero and negative powers in a few dumps of the first product (left out of the image)."""
    with h5py.File(path, "a") as f:
        d = f["data"][()]
        d[5, 3:9, 0] = np.nan
        d[6, :, 0] = 0.0
        d[40:44, 7, 0] = -1.0
        f["data"][...] = d


def test_flag_jobs_data_image_is_the_one_read_from_the_scan_file(tmp_path):
    """The data image stored by the flag job equals the one the review used to read from
    the scan file (brute force: :func:`data_preview`, dump by dump from the file)."""
    from rfisieve.cli.night import flag_scans
    from rfisieve.review import provenance, tables

    scan = tmp_path / "scans" / "s.h5"
    scan.parent.mkdir()
    make_scan(scan, ntime=1500, nchan=40, nprod=2, seed=5, upstream=True)
    _with_bad_samples(scan)
    outdir = tmp_path / "out"
    rec, = flag_scans([scan], outdir, _run(tmp_path))
    assert rec["status"] == "flagged", rec
    got = tables.read_scan_h5(outdir / "occupancy" / "s.h5")
    want, note = provenance.data_preview(str(scan), got["image/time_start"], got["image/chan_start"])
    assert want is not None, note
    np.testing.assert_array_equal(got["image/data"], want)   # NaN where the file gave nothing valid
    assert got["attrs"]["data_image_note"] == note


@pytest.mark.parametrize("step,overlap", [(7, 3), (5, 0), (64, 10)])
def test_data_image_from_overlapping_blocks_that_split_its_bins(tmp_path, step, overlap):
    """Blocks of any length, overlapping or not, that split a bin's dumps between them
    give the image read from the file (:func:`data_preview`)."""
    from rfisieve.io.scan import open_scan
    from rfisieve.review import counts, provenance

    scan = tmp_path / "s.h5"
    make_scan(scan, ntime=300, nchan=24, nprod=3, seed=6, upstream=True)
    _with_bad_samples(scan)
    ts, cs = counts.bin_starts(300, 70), counts.bin_starts(24, 10)
    want, note = provenance.data_preview(str(scan), ts, cs)
    with open_scan(scan) as sc:
        image = provenance.DataImage(ts, cs, sc.first_auto, sc.products[sc.first_auto])
        for a in range(0, 300, step):
            image.add(max(0, a - overlap), sc.read(max(0, a - overlap), a + step, ("data", "flags")))
    got, got_note = image.result()
    np.testing.assert_array_equal(got, want)
    assert got_note == note
    assert provenance.DataImage(ts, cs, 0, "x").result() is None   # nothing seen: no image


def test_outputs_that_stand_are_kept_and_stale_ones_redone(tmp_path):
    from rfisieve.cli.night import flag_scans

    scans = tmp_path / "scans"
    scans.mkdir()
    make_scan(scans / "s.h5", ntime=128, nchan=16, nprod=1, seed=1)
    bands = tmp_path / "bands"
    shutil.copytree(ROOT / "config" / "bands", bands)
    outdir = tmp_path / "out"
    run = _run(tmp_path, bands_dir=str(bands))
    flag_scans([scans / "s.h5"], outdir, run)
    mask = outdir / "flags" / "s.h5"
    first = mask.stat().st_mtime_ns
    entries = night.check_night([scans / "s.h5"], run)
    assert night.expire_stale(entries, outdir, run) == {}
    rec, = flag_scans([scans / "s.h5"], outdir, run)  # the same scan, settings, version: kept
    assert rec["reused"] and mask.stat().st_mtime_ns == first
    # the band config's content changes (its mtime does not matter): the record goes
    text = (bands / "L.yaml").read_text()
    (bands / "L.yaml").write_text(text.replace("chi1: 8.0", "chi1: 5.0", 1))
    entries = night.check_night([scans / "s.h5"], run)
    assert night.expire_stale(entries, outdir, run) == {"s": "its band config changed since its mask was made"}
    assert not (outdir / "scans" / "s.json").exists()
    rec, = flag_scans([scans / "s.h5"], outdir, run)
    assert not rec["reused"] and mask.stat().st_mtime_ns != first
    with h5py.File(mask) as f:
        assert json.loads(f.attrs["band_settings"])["sumthreshold"]["chi1"] == 5.0


def test_a_replaced_scan_is_not_the_one_its_mask_was_made_from(tmp_path):
    from rfisieve.cli.night import flag_scans

    scans = tmp_path / "scans"
    scans.mkdir()
    make_scan(scans / "s.h5", ntime=128, nchan=16, nprod=1, seed=1)
    outdir = tmp_path / "out"
    run = _run(tmp_path)
    flag_scans([scans / "s.h5"], outdir, run)
    make_scan(scans / "s.h5", ntime=128, nchan=16, nprod=1, seed=2)  # same name and size, new data
    entries = night.check_night([scans / "s.h5"], run)
    assert night.expire_stale(entries, outdir, run, remove=False) == {
        "s": "the scan file is not the one its mask was made from"}
    assert (outdir / "scans" / "s.json").exists(), "remove=False (a dry run) removes nothing"


def test_a_scan_held_open_for_writing_is_quarantined_not_fatal(tmp_path):
    import subprocess
    import sys

    busy, good = tmp_path / "busy.h5", tmp_path / "good.h5"
    make_scan(busy, ntime=64, nchan=16, nprod=1, seed=1)
    make_scan(good, ntime=64, nchan=16, nprod=1, seed=2)
    # another process holds the file open for writing (HDF5's file lock), as a recorder would
    holder = subprocess.Popen([sys.executable, "-c", "import h5py, sys, time\n"
                               f"f = h5py.File({str(busy)!r}, 'r+')\nprint('open', flush=True)\ntime.sleep(60)"],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "open"
        entries = night.check_night([busy, good], _run(tmp_path))
    finally:
        holder.kill()
        holder.wait()
    assert entries["good"]["problem"] is None
    assert "lock" in entries["busy"]["problem"]["reason"] and str(busy) in entries["busy"]["problem"]["reason"]


def test_progress_line_names_the_scan_its_chunks_and_the_time_left(tmp_path):
    import io
    import time

    from rfisieve.cli.run import Watcher

    paths = []
    for i in range(3):
        paths.append(tmp_path / f"s{i}.h5")
        make_scan(paths[-1], ntime=100, nchan=8, nprod=1, seed=i)
    out = tmp_path / "out"
    (out / "scans").mkdir(parents=True)
    (out / "logs" / "flag").mkdir(parents=True)
    w = Watcher(str(out), [str(p) for p in paths], stream=io.StringIO())
    w.t0 -= 10  # ten seconds into the night: s0 done, s1 half-way
    (out / "scans" / "s0.json").write_text("{}")
    (out / "logs" / "flag" / "s1.progress").write_text(json.dumps(
        {"scan": "s1", "done": 2, "total": 4, "samples": 800}))
    line = w.status()
    # 1.5 of 3 equal scans in 10 s: half done, about 10 s left
    assert line.startswith("flagging s1 (2/4 chunks); night: 1/3 scans, 50 % of samples, ~10 s left"), line
    (out / "logs" / "flag" / "s1.progress").unlink()
    for s in ("s1", "s2"):
        (out / "scans" / f"{s}.json").write_text("{}")
    assert w.status() == "night: 3/3 scans done; writing the review page"
    assert time.time() - w.t0 < 60


@pytest.mark.slow
def test_a_scan_that_fails_while_flagged_gets_a_record_and_no_mask(tmp_path):
    # The checks pass (layout, band, shapes), then a damaged data chunk fails the read:
    # the scan's record names stage 'flag' and the reason; nothing of it is left behind.
    from rfisieve.cli.night import flag_scans, wrap_up

    scans = tmp_path / "scans"
    scans.mkdir()
    good, bad = scans / "good.h5", scans / "damaged.h5"
    make_scan(good, ntime=128, nchan=16, nprod=1, seed=1)
    make_scan(bad, ntime=128, nchan=16, nprod=1, seed=2)
    with h5py.File(bad, "a") as f:  # /data rewritten as gzip chunks far into the file
        data = f["data"][()]
        del f["data"]
        f.create_dataset("data", data=np.tile(data, (64, 1, 1))[:128], chunks=(8, 16, 1), compression="gzip")
        f.create_dataset("pad", data=np.zeros(1 << 18))  # the damage lies beyond the identity's first MiB
        offset = f["data"].id.get_chunk_info(10).byte_offset
    with open(bad, "r+b") as fh:
        fh.seek(offset)
        fh.write(b"\xff" * 64)
    entries = night.check_night([good, bad], _run(tmp_path))
    assert entries["damaged"]["problem"] is None, "the damage is not visible to the checks"
    outdir = tmp_path / "out"
    recs = {r["scan"]: r for r in flag_scans([good, bad], outdir, _run(tmp_path))}
    assert recs["good"]["status"] == "flagged"
    assert recs["damaged"]["status"] == "failed" and recs["damaged"]["stage"] == "flag"
    assert str(bad) in recs["damaged"]["reason"] and "\n" not in recs["damaged"]["reason"]
    assert not (outdir / "flags" / "damaged.h5").exists() and not list((outdir / "flags").glob(".*"))
    flagged, failed = wrap_up(str(outdir), [str(outdir / "scans" / f"{s}.json") for s in ("damaged", "good")])
    assert [r["scan"] for r in flagged] == ["good"] and [r["scan"] for r in failed] == ["damaged"]
    assert (outdir / "report" / "index.html").is_file() and (outdir / "occupancy" / "run.csv").is_file()
