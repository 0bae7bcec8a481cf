"""Occupancy statistics checked against brute force written straight from the definition.

Check values: every expected number below is recomputed by plain Python loops over a
small hand-made mask (definition of occupancy: flagged samples / samples; a sample
with several cause bits counts once overall and once per cause; docs/design.md 3.2-3.3).
"""

import csv

import h5py
import numpy as np
import pytest

from rfisieve import bits

from rfisieve.review import occupancy as occ
from rfisieve.errors import ScanError

PRODUCTS = ["pier1.a-pier1.a", "pier1.a-pier2.a", "pier2.b-pier2.b"]


def write_mask(path, flags, freq, band="L", t0=1.7e9, dt=2.0, products=PRODUCTS, chunk=None):
    """A mask file laid out as docs/design.md 3.2 (written here, not by the engine)."""
    nt = flags.shape[0]
    with h5py.File(path, "w") as f:
        f.create_dataset("flags", data=flags.astype(np.uint8), chunks=chunk)
        f.create_dataset("time", data=t0 + dt * np.arange(nt))
        f.create_dataset("freq", data=np.asarray(freq, float))
        f.create_dataset("products", data=np.array(products, dtype=h5py.string_dtype()))
        f.attrs["band"] = band
    return path


def hand_mask(seed=1, shape=(9, 7, 3)):
    rng = np.random.default_rng(seed)
    m = np.zeros(shape, np.uint8)
    for value in (bits.UPSTREAM, bits.KNOWN, bits.SK, bits.SUMTHRESHOLD, bits.GROWN):
        m |= np.where(rng.random(shape) < 0.25, value, 0).astype(np.uint8)
    m[:, 2, :] |= bits.KNOWN          # a whole static channel
    m[shape[0] // 2, :, 1] |= bits.CUT  # a dump cut on one product
    m[0, 0, 0] = bits.SK | bits.SUMTHRESHOLD  # a two-cause sample
    return m


def brute(m):
    nt, nc, npr = m.shape
    out = {"samples": [0] * nc, "flagged": [0] * nc, "bits": [[0] * nc for _ in bits.BIT_TABLE],
           "primary": [[0] * nc for _ in bits.BIT_TABLE], "prod": [[0] * nc for _ in range(npr)],
           "dump": [0] * nt}
    for t in range(nt):
        for c in range(nc):
            for p in range(npr):
                v = int(m[t, c, p])
                out["samples"][c] += 1
                if v:
                    out["flagged"][c] += 1
                    out["prod"][p][c] += 1
                    out["dump"][t] += 1
                first = True
                for k, (_, value, _, _) in enumerate(bits.BIT_TABLE):
                    if v & value:
                        out["bits"][k][c] += 1
                        if first:
                            out["primary"][k][c] += 1
                            first = False
    return out


def test_counts_match_brute_force_in_csv_and_h5(tmp_path):
    m = hand_mask()
    freq = 1.4e9 + 1e6 * np.arange(m.shape[1])
    mask = write_mask(tmp_path / "s1.h5", m, freq, chunk=(2, 7, 3))
    csv_path, h5_path = tmp_path / "s1.csv", tmp_path / "s1occ.h5"
    occ.occupancy_of_mask(mask, csv_path, h5_path, chunk_dumps=2)   # chunked read: 2 dumps at a time
    b = brute(m)
    c = occ.read_scan_h5(h5_path)
    assert c["channel/samples"].tolist() == b["samples"]
    assert c["channel/flagged"].tolist() == b["flagged"]
    assert c["channel/bits"].tolist() == b["bits"]
    assert c["channel/primary"].tolist() == b["primary"]
    assert c["channel/product_flagged"].tolist() == b["prod"]
    assert c["dump/flagged"].tolist() == b["dump"]
    # primary causes partition the flagged samples exactly
    assert (c["channel/primary"].sum(axis=0) == c["channel/flagged"]).all()
    # the image adds up to the whole mask
    assert c["image/flagged"].sum() == sum(b["flagged"]) and c["image/samples"].sum() == m.size

    with open(csv_path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == m.shape[1]
    for ch, r in enumerate(rows):
        assert r["band"] == "L" and int(r["channel"]) == ch
        assert float(r["freq_mhz"]) == pytest.approx(freq[ch] / 1e6, abs=1e-6)
        assert int(r["samples"]) == b["samples"][ch]
        assert float(r["flagged_fraction"]) == pytest.approx(b["flagged"][ch] / b["samples"][ch], rel=1e-9)
        for k, name in enumerate(bits.NAMES):
            assert float(r[f"{name}_fraction"]) == pytest.approx(b["bits"][k][ch] / b["samples"][ch], rel=1e-9, abs=1e-12)
        for p, prod in enumerate(PRODUCTS):
            assert float(r[f"flagged_fraction_{prod}"]) == pytest.approx(b["prod"][p][ch] / m.shape[0], rel=1e-9, abs=1e-12)


def test_two_cause_sample_counts_once_overall():
    m = np.zeros((1, 1, 1), np.uint8)
    m[0, 0, 0] = bits.SK | bits.SUMTHRESHOLD
    c = occ.mask_counts(m)
    assert c["channel/flagged"].tolist() == [1]
    k_sk, k_st = bits.NAMES.index("sk"), bits.NAMES.index("sumthreshold")
    assert c["channel/bits"][k_sk, 0] == 1 and c["channel/bits"][k_st, 0] == 1
    assert c["channel/bits"].sum() == 2
    assert c["channel/primary"][k_sk, 0] == 1 and c["channel/primary"].sum() == 1


def test_image_bins_are_fractions_of_their_block():
    m = hand_mask(seed=3, shape=(10, 9, 2))
    c = occ.mask_counts(m, image_bins=(3, 4))
    ts, cs = c["image/time_start"], c["image/chan_start"]
    assert len(ts) == 4 and len(cs) == 5 and ts[-1] == 10 and cs[-1] == 9
    for i in range(3):
        for j in range(4):
            block = m[ts[i]:ts[i + 1], cs[j]:cs[j + 1], :]
            assert c["image/flagged"][i, j] == np.count_nonzero(block)
            assert c["image/samples"][i, j] == block.size


def test_run_aggregation_is_sample_weighted_across_grids(tmp_path):
    # scan A: 4 dumps on channels 1400..1404 MHz; scan B: 12 dumps on 1402..1406 MHz (grids overlap)
    ma, mb = hand_mask(5, (4, 5, 3)), hand_mask(6, (12, 5, 3))
    fa, fb = 1.4e9 + 1e6 * np.arange(5), 1.402e9 + 1e6 * np.arange(5)
    for name, m, f in (("a", ma, fa), ("b", mb, fb)):
        occ.occupancy_of_mask(write_mask(tmp_path / f"{name}.h5", m, f), None, tmp_path / f"occ_{name}.h5")
    scans = [occ.read_scan_h5(tmp_path / f"occ_{n}.h5") for n in "ab"]
    run = occ.aggregate_run(scans)["L"]
    grid = 1.4e9 + 1e6 * np.arange(7)
    assert np.allclose(run["freq"], grid)
    for ch, f in enumerate(grid):
        fl = sm = 0
        nscan = 0
        for m, fs in ((ma, fa), (mb, fb)):
            hit = np.flatnonzero(np.isclose(fs, f))
            if len(hit):
                nscan += 1
                fl += np.count_nonzero(m[:, hit[0], :])
                sm += m.shape[0] * m.shape[2]
        assert run["scans"][ch] == nscan and run["samples"][ch] == sm and run["flagged"][ch] == fl
    # channel 1403 MHz: the run fraction is the sample-weighted mean, not the mean of fractions
    rows = occ.run_table({"L": run})
    head = rows[0]
    r = rows[1 + 3]
    fa3 = np.count_nonzero(ma[:, 3]) / ma[:, 3].size
    fb1 = np.count_nonzero(mb[:, 1]) / mb[:, 1].size
    expect = (fa3 * ma[:, 3].size + fb1 * mb[:, 1].size) / (ma[:, 3].size + mb[:, 1].size)
    assert float(r[head.index("flagged_fraction")]) == pytest.approx(expect, rel=1e-9)
    assert r[head.index("freq_mhz")] == "1403.000000"


def test_occupied_ranges_are_contiguous_runs():
    f = 1e9 + 1e6 * np.arange(10)
    flagged = np.array([0, 5, 6, 0, 0, 9, 10, 10, 0, 3])
    samples = np.full(10, 10)
    r = occ.occupied_ranges(f, flagged, samples, threshold=0.5)
    assert [(x["first"], x["last"]) for x in r] == [(5, 7), (1, 2)]
    assert r[0]["start_mhz"] == pytest.approx(1004.5) and r[0]["stop_mhz"] == pytest.approx(1007.5)
    assert r[0]["mean_fraction"] == pytest.approx(29 / 30)


def test_bad_mask_is_one_line_error(tmp_path):
    p = tmp_path / "bad.h5"
    with h5py.File(p, "w") as f:
        f.create_dataset("flags", data=np.zeros((2, 2, 2), np.uint8))
    with pytest.raises(ScanError) as err:
        occ.count_mask_file(p)
    assert "bad.h5" in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(ScanError):
        occ.count_mask_file(tmp_path / "missing.h5")


def test_outputs_leave_no_temporary_files(tmp_path):
    m = hand_mask()
    mask = write_mask(tmp_path / "s.h5", m, 1e9 + 1e6 * np.arange(m.shape[1]))
    out = tmp_path / "occ"
    out.mkdir()
    occ.occupancy_of_mask(mask, out / "s.csv", out / "s.h5")
    assert sorted(p.name for p in out.iterdir()) == ["s.csv", "s.h5"]


def test_compiled_count_matches_brute_force_for_every_mask_value():
    # Every uint8 value appears, so the per-value tables of the compiled pass are checked
    # for all 256 values against the definition (brute force above; per dump and per
    # product written out here too), with the block added in uneven chunks of dumps.
    rng = np.random.default_rng(7)
    shape = (40, 11, 3)
    m = rng.integers(0, 256, size=shape, dtype=np.uint8)
    m[rng.random(shape) < 0.4] = 0
    m.reshape(-1)[:256] = np.arange(256, dtype=np.uint8)
    acc = occ.ScanOccupancy(*shape, image_bins=(7, 4))
    for a, b in ((0, 3), (3, 17), (17, 40)):
        acc.add(a, m[a:b])
    got = acc.result()
    b = brute(m)
    np.testing.assert_array_equal(got["channel/flagged"], b["flagged"])
    np.testing.assert_array_equal(got["channel/bits"], b["bits"])
    np.testing.assert_array_equal(got["channel/primary"], b["primary"])
    np.testing.assert_array_equal(got["channel/product_flagged"], b["prod"])
    np.testing.assert_array_equal(got["dump/flagged"], b["dump"])
    values = [row[1] for row in bits.BIT_TABLE]
    dump_bits = [[sum(1 for c in range(shape[1]) for p in range(shape[2]) if m[t, c, p] & v)
                  for t in range(shape[0])] for v in values]
    prod_bits = [[sum(1 for t in range(shape[0]) for c in range(shape[1]) if m[t, c, p] & v)
                  for p in range(shape[2])] for v in values]
    np.testing.assert_array_equal(got["dump/bits"], dump_bits)
    np.testing.assert_array_equal(got["product/bits"], prod_bits)
    np.testing.assert_array_equal(got["product/flagged"], [int(np.count_nonzero(m[:, :, p])) for p in range(3)])
    ts, cs = got["image/time_start"], got["image/chan_start"]
    img = [[sum(1 for t in range(ts[i], ts[i + 1]) for c in range(cs[j], cs[j + 1]) for p in range(3) if m[t, c, p])
            for j in range(len(cs) - 1)] for i in range(len(ts) - 1)]
    np.testing.assert_array_equal(got["image/flagged"], img)
