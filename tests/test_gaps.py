"""Gaps split detection: a scan with a ten-minute gap in /time gets, for each contiguous
stretch, exactly the mask that flagging that stretch alone gives (issue 12), through
both ways (staged detect + merge, and the one-pass flag_scan) and any chunking."""

import h5py
import numpy as np
import pytest

from conftest import sha256
from rfisieve.config.defaults import band_settings, run_settings
from rfisieve.engine import detect, flag_scan, merge, plan_scan
from scanfactory import make_scan

# eta 0.3 and low cut limits so that SIR growth and both cuts act near the gap
BAND = band_settings({"band": "L", "growth": {"eta": 0.3}, "cuts": {"channel_limit": 0.3, "dump_limit": 0.3}})
GAP_S = 600.0  # ten minutes
N1, N2 = 700, 500


def _copy(src, dst, rows, t_shift=0.0):
    with h5py.File(src, "r") as f, h5py.File(dst, "w") as g:
        for name in ("data", "time", "products"):
            g[name] = f[name][()] if name == "products" else f[name][rows]
        g["time"][...] += t_shift
        g["freq"] = f["freq"][()]
        for key, value in f.attrs.items():
            g.attrs[key] = value


@pytest.fixture(scope="module")
def scans(tmp_path_factory):
    """(gapped scan, first stretch alone, second stretch alone)."""
    d = tmp_path_factory.mktemp("gaps")
    base = d / "base.h5"
    make_scan(base, ntime=N1 + N2, nchan=32, nprod=2, seed=11)
    with h5py.File(base, "a") as f:  # strong interference right at both sides of the gap
        f["data"][N1 - 6:N1 + 6, 5:9] *= 3.0
        f["data"][N1 - 40:N1 + 40, 20] *= 1.5
    gapped, first, second = d / "gapped.h5", d / "first.h5", d / "second.h5"
    _copy(base, gapped, slice(None))
    with h5py.File(gapped, "a") as f:
        t = f["time"][()]
        t[N1:] += GAP_S
        f["time"][...] = t
    _copy(base, first, slice(0, N1))
    _copy(base, second, slice(N1, None), t_shift=GAP_S)
    return gapped, first, second


def _flags(path):
    with h5py.File(path, "r") as f:
        return f["flags"][()]


def _one_pass(scan, out, **run):
    flag_scan(scan, out, BAND, run_settings({"chunk_dumps": 256, "workers": 2, **run}))
    return _flags(out)


def _staged(scan, tmp, **run):
    run = run_settings({"chunk_dumps": 256, "workers": 2, **run})
    plan = plan_scan(scan, BAND, run)
    parts = []
    for det in ("sk", "sumthreshold"):
        parts.append(tmp / f"{scan.stem}.{det}.h5")
        detect(scan, parts[-1], det, BAND, run, plan=plan)
    out = tmp / f"{scan.stem}.h5"
    merge(scan, parts, out, BAND, run)
    return _flags(out)


def test_gaps_split_detection_one_pass(scans, tmp_path):
    gapped, first, second = scans
    before = [sha256(p) for p in scans]
    mask = _one_pass(gapped, tmp_path / "g.h5")
    np.testing.assert_array_equal(mask[:N1], _one_pass(first, tmp_path / "a.h5"))
    np.testing.assert_array_equal(mask[N1:], _one_pass(second, tmp_path / "b.h5"))
    assert [sha256(p) for p in scans] == before


def test_gaps_split_detection_staged(scans, tmp_path):
    gapped, first, second = scans
    mask = _staged(gapped, tmp_path)
    np.testing.assert_array_equal(mask[:N1], _staged(first, tmp_path))
    np.testing.assert_array_equal(mask[N1:], _staged(second, tmp_path))


def test_gaps_split_detection_whatever_the_chunks(scans, tmp_path):
    gapped, _, _ = scans
    np.testing.assert_array_equal(_one_pass(gapped, tmp_path / "a.h5", chunk_dumps=300),
                                  _one_pass(gapped, tmp_path / "b.h5", chunk_dumps=4096))


def test_the_flags_near_the_gap_are_the_stretches_own(scans, tmp_path):
    # The check above means something: across the gap, the same data flagged as one
    # stretch gives another mask near the gap.
    gapped, _, _ = scans
    with h5py.File(gapped, "r") as f:
        t = f["time"][()]
    joined = tmp_path / "joined.h5"
    _copy(gapped, joined, slice(None))
    with h5py.File(joined, "a") as f:
        f["time"][...] = t[0] + 2.0 * np.arange(t.size)
    assert not np.array_equal(_one_pass(gapped, tmp_path / "g.h5"), _one_pass(joined, tmp_path / "j.h5"))


def test_plan_reports_gaps_and_no_chunk_straddles_one(scans):
    gapped, _, _ = scans
    plan = plan_scan(gapped, BAND, run_settings({"chunk_dumps": 256}))
    assert plan["segments"] == [[0, N1], [N1, N1 + N2]]
    assert plan["gaps"] == [{"after_dump": N1 - 1, "seconds": GAP_S + 2.0}]
    assert all(not (c0 < N1 < c1) for c0, c1 in plan["chunks"])
    assert plan["chunks"][:4] == [[0, 256], [256, 512], [512, N1], [N1, N1 + 256]]
