"""The chunked engine: chunk independence, worker independence, invalid samples,
bad files, and the mask file layout of docs/design.md 3.2."""

import json
import os

import h5py
import numpy as np
import pytest

from rfisieve import bits
from rfisieve.engine import detect, flag_scan, merge, plan_scan
from rfisieve.errors import ScanError
from rfisieve.config.defaults import band_settings, run_settings
from scanfactory import make_scan

BAND = band_settings({"band": "L"})


def _flag(scan, out, **run):
    flag_scan(scan, out, BAND, run_settings(run))
    with h5py.File(out, "r") as f:
        return f["flags"][()]


@pytest.fixture(scope="module")
def scan(tmp_path_factory):
    path = tmp_path_factory.mktemp("scan") / "qro_test_L.h5"
    make_scan(path, ntime=4500, nchan=48, nprod=2, seed=3)
    return path


def test_chunking_does_not_change_the_mask(scan, tmp_path):
    # Issue 2: masks from chunk_dumps 256 and 4096 agree on at least 99.99 % of samples.
    a = _flag(scan, tmp_path / "a.h5", chunk_dumps=256, workers=2)
    b = _flag(scan, tmp_path / "b.h5", chunk_dumps=4096, workers=2)
    agree = np.mean(a == b)
    assert agree >= 0.9999, agree


@pytest.mark.parametrize("bands, ntime, seed", [(("L",), 4000, 7), (("L", "P", "C"), 5000, 14)])
def test_a_simulated_scan_gives_one_mask_whatever_the_chunks(tmp_path, bands, ntime, seed):
    # Check value: the engine's chunk invariance (docs/design.md 5: a sample's result does
    # not depend on where chunks start), with the shipped band config (bandpass model,
    # persistence test, compact boxes, feed pairs) on the project's simulator's scenes
    # of 512 channels; the last scan of the night is flagged.  These scenes found three
    # faults the test planes above missed: shifted blocks at L = T tested or not
    # depending on where a plane started (L, seed 7: 311 samples differed at chunks of
    # 700 dumps), a cut of the persistence test's rows to its own reach (43 samples),
    # and an isolated part of a fine-test hit kept or not depending on whether its
    # channel had a coarse candidate anywhere in the plane (C, seed 14: 13 samples).
    from rfisieve.config.load import load_band
    from rfisieve.sim.scans import simulate_night

    root = os.path.join(os.path.dirname(__file__), "..")
    band = load_band(os.path.join(root, "config", "bands"), bands[-1])[0]
    simulate_night(tmp_path / "night", nscans=len(bands), bands=bands, ntime=ntime, nchan=512, seed=seed,
                   s2="none")
    scan = sorted((tmp_path / "night" / "scans").glob(f"*_{bands[-1]}.h5"))[-1]
    masks = []
    for chunk in (700, 8192):
        out = tmp_path / f"c{chunk}.h5"
        flag_scan(scan, out, band, run_settings({"chunk_dumps": chunk, "workers": 2}))
        with h5py.File(out, "r") as f:
            masks.append(f["flags"][()])
    np.testing.assert_array_equal(masks[0], masks[1])


@pytest.mark.parametrize("ntime", [1, 255, 256, 257, 1023, 1024, 2048, 3000, 4096, 32768])
def test_noise_windows_read_at_most_a_quarter(ntime):
    """The pre-pass windows (plan.noise_windows, from its definition): inside the scan, in
    order, not overlapping, the first at dump 0 and (two or more) the last ending at the
    last dump; at most four windows of 256 dumps and a quarter of the scan, at least one;
    a scan of up to 256 dumps is one window."""
    from rfisieve.engine import noise_windows

    w = noise_windows(ntime)
    assert 1 <= len(w) <= 4
    if ntime <= 256:
        assert w == [[0, ntime]]
        return
    assert all(b - a == 256 for a, b in w)
    assert w[0][0] == 0 and (len(w) == 1 or w[-1][1] == ntime)
    assert all(w[k][1] <= w[k + 1][0] for k in range(len(w) - 1))
    assert len(w) == 1 or 256 * len(w) <= ntime / 4


@pytest.mark.parametrize("ntime", [1, 255, 256, 700, 1024, 1025, 2048, 3000, 4096, 32768])
def test_reference_windows_tile_a_short_scan(ntime):
    """The reference's windows (plan.reference_windows, from its definition): up to 1024
    dumps they tile the scan exactly; beyond, four of 256 dumps from the first dump to the
    last; from 4096 dumps on they are the noise windows."""
    from rfisieve.engine import noise_windows
    from rfisieve.engine.plan import reference_windows

    w = reference_windows(ntime)
    assert 1 <= len(w) <= 4
    assert all(w[k][1] <= w[k + 1][0] for k in range(len(w) - 1))
    if ntime <= 1024:
        assert w[0][0] == 0 and w[-1][1] == ntime
        assert all(w[k][1] == w[k + 1][0] for k in range(len(w) - 1))
    else:
        assert len(w) == 4 and all(b - a == 256 for a, b in w) and w[-1][1] == ntime
    if ntime >= 4096:
        assert w == noise_windows(ntime)


def test_workers_do_not_change_the_mask(scan, tmp_path):
    # Issue 2: identical masks for 1 and 2 workers.
    a = _flag(scan, tmp_path / "a.h5", chunk_dumps=512, workers=1)
    b = _flag(scan, tmp_path / "b.h5", chunk_dumps=512, workers=2)
    np.testing.assert_array_equal(a, b)


def test_processes_scheduler_equals_threads(tmp_path):
    path = tmp_path / "small_L.h5"
    make_scan(path, ntime=700, nchan=32, nprod=2, seed=4)
    a = _flag(path, tmp_path / "a.h5", chunk_dumps=256, workers=2, scheduler="threads")
    b = _flag(path, tmp_path / "b.h5", chunk_dumps=256, workers=2, scheduler="processes")
    np.testing.assert_array_equal(a, b)


def test_mask_file_layout(tmp_path):
    path = tmp_path / "qro_layout_L.h5"
    make_scan(path, ntime=400, nchan=32, nprod=2, seed=5, cross=True, upstream=True)
    out = tmp_path / "flags" / "qro_layout_L.h5"
    flag_scan(path, out, BAND, run_settings({"chunk_dumps": 128}), band_source={"path": "L.yaml", "text": "x: 1"})
    with h5py.File(path, "r") as src, h5py.File(out, "r") as f:
        m = f["flags"]
        assert m.dtype == np.uint8 and m.shape == src["data"].shape
        assert m.compression is not None and m.chunks is not None
        np.testing.assert_array_equal(f["time"][()], src["time"][()])
        np.testing.assert_array_equal(f["freq"][()], src["freq"][()])
        assert [p.decode() if isinstance(p, bytes) else p for p in f["products"][()]] == \
            [p.decode() if isinstance(p, bytes) else p for p in src["products"][()]]
        mask = m[()]
        # bit 0 set exactly where the scan's /flags is nonzero
        np.testing.assert_array_equal((mask & bits.UPSTREAM) != 0, src["flags"][()] != 0)
        table = json.loads(f.attrs["bit_table"])
        assert [(r["bit"], r["value"], r["name"]) for r in table] == [b[:3] for b in bits.BIT_TABLE]
        assert f.attrs["band_config_text"] == "x: 1"
        assert json.loads(f.attrs["input_identity"])["size"] == os.path.getsize(path)
        assert "rfisieve_version" in f.attrs
        # no kurtosis bit on the cross product (SK is for power only: docs/design.md 4)
        assert not np.any(mask[:, :, -1] & bits.SK)
        assert "diagnostics/sk/counts" in f


def test_lines_are_found(tmp_path):
    path = tmp_path / "lines_L.h5"
    truth = make_scan(path, ntime=600, nchan=64, nprod=1, seed=6)
    mask = _flag(path, tmp_path / "m.h5", chunk_dumps=256)
    hit = mask != 0
    assert hit[truth].mean() > 0.95
    assert hit[~truth].mean() < 0.01


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf, 0.0, -1.0])
def test_invalid_samples_are_flagged_and_isolated(tmp_path, bad):
    clean = tmp_path / "clean_L.h5"
    make_scan(clean, ntime=600, nchan=48, nprod=1, seed=7, lines=False)
    dirty = tmp_path / "dirty_L.h5"
    with h5py.File(clean, "r") as f, h5py.File(dirty, "w") as g:
        for k in f:
            f.copy(f[k], g)
        g.attrs.update(dict(f.attrs))
        d = g["data"][()]
        d[100, 5, 0] = bad
        d[300, :, 0] = bad        # a dropped dump
        d[:, 20, 0][::7] = bad    # a channel with holes
        g["data"][...] = d
    bad_at = ~np.isfinite(d) | (d <= 0)
    m_clean = _flag(clean, tmp_path / "mc.h5", chunk_dumps=256)
    m_dirty = _flag(dirty, tmp_path / "md.h5", chunk_dumps=256)
    assert np.all(m_dirty[bad_at] & bits.INVALID)
    assert not np.any(m_dirty[~bad_at] & bits.INVALID)
    # every other sample keeps its clean result (allowing noise-level changes of the
    # plane-wide noise estimate: 99.9 % of the other samples identical)
    same = (m_clean == m_dirty)[~bad_at]
    assert same.mean() > 0.999


def test_bad_values_give_the_same_mask_whatever_they_are(tmp_path):
    masks = []
    for i, bad in enumerate([np.nan, -5.0, 0.0]):
        path = tmp_path / f"s{i}_L.h5"
        make_scan(path, ntime=300, nchan=32, nprod=1, seed=8)
        with h5py.File(path, "r+") as f:
            d = f["data"][()]
            d[50:52, 3:9, 0] = bad
            f["data"][...] = d
        masks.append(_flag(path, tmp_path / f"m{i}.h5", chunk_dumps=128))
    np.testing.assert_array_equal(masks[0], masks[1])
    np.testing.assert_array_equal(masks[0], masks[2])


def test_truncated_scan_gives_one_line_error_and_no_mask(tmp_path):
    path = tmp_path / "trunc_L.h5"
    make_scan(path, ntime=2000, nchan=64, nprod=2, seed=9)
    size = path.stat().st_size
    with open(path, "r+b") as fh:
        fh.truncate(size // 2)
    out = tmp_path / "flags" / "trunc_L.h5"
    with pytest.raises(ScanError) as err:
        flag_scan(path, out, BAND, run_settings({"chunk_dumps": 256}))
    msg = str(err.value)
    assert "\n" not in msg and str(path) in msg
    assert not out.exists()
    assert not any(p.name.endswith(".h5") for p in out.parent.iterdir()) if out.parent.exists() else True


@pytest.mark.parametrize("problem", ["missing_data", "wrong_freq", "no_band", "bad_acc", "flags_shape", "2d"])
def test_malformed_scan_gives_one_line_error(tmp_path, problem):
    path = tmp_path / "bad_L.h5"
    make_scan(path, ntime=100, nchan=16, nprod=1, seed=10)
    with h5py.File(path, "r+") as f:
        if problem == "missing_data":
            del f["data"]
        elif problem == "wrong_freq":
            del f["freq"]
            f["freq"] = np.arange(15.0)
        elif problem == "no_band":
            del f.attrs["band"]
        elif problem == "bad_acc":
            f.attrs["accumulations"] = -3
        elif problem == "flags_shape":
            f["flags"] = np.zeros((100, 16), dtype=np.uint8)
        elif problem == "2d":
            del f["data"]
            f["data"] = np.ones((100, 16), dtype=np.float32)
    out = tmp_path / "out.h5"
    with pytest.raises(ScanError) as err:
        flag_scan(path, out, BAND, run_settings({}))
    assert "\n" not in str(err.value) and str(path) in str(err.value)
    assert not out.exists()


def test_input_is_opened_read_only_and_unchanged(tmp_path):
    import hashlib

    path = tmp_path / "ro_L.h5"
    make_scan(path, ntime=300, nchan=32, nprod=1, seed=11)
    os.chmod(path, 0o444)
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    flag_scan(path, tmp_path / "m.h5", BAND, run_settings({"chunk_dumps": 128}))
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before


def test_stages_equal_flag_scan(tmp_path):
    path = tmp_path / "st_L.h5"
    make_scan(path, ntime=500, nchan=32, nprod=2, seed=12)
    run = run_settings({"chunk_dumps": 200})
    plan = plan_scan(path, BAND, run)
    assert plan["chunks"][0] == [0, 200] and plan["chunks"][-1] == [400, 500]
    parts = []
    for det in ("sk", "sumthreshold"):
        parts.append(tmp_path / f"{det}.h5")
        detect(path, parts[-1], det, BAND, run, plan=plan)
    merge(path, parts, tmp_path / "staged.h5", BAND, run)
    one = _flag(path, tmp_path / "one.h5", chunk_dumps=200)
    with h5py.File(tmp_path / "staged.h5", "r") as f:
        np.testing.assert_array_equal(f["flags"][()], one)


def test_other_layout_axis_order(tmp_path):
    # A scan stored (product, freq, time) with other dataset names, mapped in the run config.
    path = tmp_path / "std_L.h5"
    make_scan(path, ntime=300, nchan=32, nprod=2, seed=13)
    other = tmp_path / "other_L.h5"
    with h5py.File(path, "r") as f, h5py.File(other, "w") as g:
        g["vis/power"] = np.transpose(f["data"][()], (2, 1, 0))
        g["vis/mjd_s"] = f["time"][()]
        g["vis/chan_hz"] = f["freq"][()]
        g["vis/names"] = f["products"][()]
        g.attrs.update(dict(f.attrs))
    layout = {"data": "vis/power", "time": "vis/mjd_s", "freq": "vis/chan_hz", "products": "vis/names",
              "axes": ["product", "freq", "time"]}
    a = _flag(path, tmp_path / "a.h5", chunk_dumps=128)
    flag_scan(other, tmp_path / "b.h5", BAND, run_settings({"chunk_dumps": 128, "layout": layout}))
    with h5py.File(tmp_path / "b.h5", "r") as f:
        np.testing.assert_array_equal(f["flags"][()], a)


@pytest.mark.parametrize("dtype,auto", [("float32", True), ("float64", True), ("complex64", True),
                                        ("complex64", False), ("complex128", False), ("float16", True)])
def test_prepare_equals_numpy_definition(dtype, auto):
    # the one-pass kernel against masks.amplitude / masks.invalid_mask and the OR of
    # the static and input flags written out in numpy (docs/design.md 3.2, bits 0-2)
    from rfisieve.engine.planes import _prepare
    from rfisieve.detect.masks import amplitude, invalid_mask

    rng = np.random.default_rng(3)
    block = rng.normal(1.0, 0.5, size=(40, 9, 3))
    if np.dtype(dtype).kind == "c":
        block = block + 1j * rng.normal(0.0, 0.5, size=block.shape)
    block = block.astype(dtype)
    block[3, 2, 1] = np.nan
    block[4, 5, 1] = np.inf
    block[5, 6, 1] = 0
    block[6, 7, 1] = -1
    flags = rng.random(block.shape) < 0.05
    static = np.zeros(9, dtype=bool)
    static[4] = True
    planes = {"data": block[:, :, 1], "flags": flags[:, :, 1]}
    meta = {"autos": [auto] * 3, "static": static}
    got = _prepare(planes, 1, meta)
    values = amplitude(block[:, :, 1], auto)
    invalid = invalid_mask(values, auto)
    np.testing.assert_array_equal(got["values"], values)
    np.testing.assert_array_equal(got["invalid"], invalid)
    np.testing.assert_array_equal(got["excluded"], invalid | static[None, :] | flags[:, :, 1])
    del planes["flags"]
    np.testing.assert_array_equal(_prepare(planes, 1, meta)["excluded"], invalid | static[None, :])


@pytest.mark.parametrize("limit,eta", [(0.3, 0.2), (1.0, 0.2), (0.5, 0.0)])
def test_merge_plane_equals_numpy_definition(limit, eta):
    # the compiled merge against the bit rules of docs/design.md 3.2 written out in numpy:
    # growth (bit 5) only where the SIR operator adds to the detectors' flags, the dump
    # cut (bit 6) only on samples no other cause flagged
    from rfisieve.engine.planes import _merge_plane
    from rfisieve.detect.masks import dump_cut
    from rfisieve.detect.growth import sir_grow

    rng = np.random.default_rng(8)
    det = np.zeros((60, 24), np.uint8)
    det[rng.random(det.shape) < 0.15] |= bits.SK
    det[rng.random(det.shape) < 0.15] |= bits.SUMTHRESHOLD
    det[20:23, :20] |= bits.SUMTHRESHOLD
    det[rng.random(det.shape) < 0.02] |= bits.INVALID
    extra = np.zeros_like(det)
    extra[:, 5] |= bits.KNOWN
    extra[rng.random(det.shape) < 0.03] |= bits.UPSTREAM
    band = band_settings({"band": "L", "growth": {"eta": eta, "reach_time": 6, "reach_freq": 3},
                          "cuts": {"dump_limit": limit}})
    core = (7, 50)
    want = det | extra
    detected = (det & bits.DETECTED) != 0
    if eta > 0:
        grown = sir_grow(detected, eta, reach_time=6, reach_freq=3)
        want[grown & ~detected] |= bits.GROWN
    want = want[core[0]:core[1]]
    cut = dump_cut(want != 0, limit)
    want[cut[:, None] & (want == 0)] = bits.CUT
    np.testing.assert_array_equal(_merge_plane(det, extra, band, core), want)
