"""Tests of the simulator (rfisieve.sim.scans): noise statistics, truth, layout, writer.

Reference values come from the radiometer equation (relative rms 1/sqrt(N); Wilson,
Rohlfs & Huettemeister, Tools of Radio Astronomy), the spectral-kurtosis estimator and
its variance (Nita & Gary 2010, MNRAS 406, L60; Nita et al. 2007, PASP 119, 805), the
distributions in scipy.stats, and brute-force simulations written from the definitions.
"""

import argparse
import json
import os

import h5py
import numpy as np
import pytest
from scipy import stats

from rfisieve.sim import scans as simulate
from rfisieve.sim.scans import inject, register_cli, simulate_night, simulate_scan
from rfisieve.sim.draw import wishart_sum

KIND_NAMES = {"carrier", "pulsed", "burst", "drifting", "intermittent", "noiselike"}


def _read(path):
    with h5py.File(path, "r") as f:
        out = {k: f[k][()] for k in f}
        out["attrs"] = dict(f.attrs)
    if "products" in out:
        out["products"] = [p.decode() if isinstance(p, bytes) else p for p in out["products"]]
    return out


def _scan(tmp_path, name="qro_test_L", **kw):
    scan = tmp_path / f"{name}.h5"
    truth = tmp_path / f"{name}.truth.h5"
    summary = simulate_scan(scan, truth, **kw)
    return _read(scan), _read(truth), summary


def _autos(products):
    return [i for i, p in enumerate(products) if p.split("-")[0] == p.split("-")[1]]


# --------------------------------------------------------------------------- noise


def test_clean_channel_relative_rms_is_radiometer_equation(tmp_path):
    # Radiometer equation: relative rms of a dump = 1/sqrt(N) (Wilson et al.).  With gain
    # and sky drift off each channel's mean is constant in time, so the check uses the
    # data alone: std/mean per channel, averaged over channels and products.
    n = 256
    d, _, _ = _scan(tmp_path, emitters=[], ntime=400, nchan=48, accumulations=n,
                    gain_drift=False, sky_drift=False, seed=3)
    x = d["data"].astype(np.float64)
    rel = x.std(axis=0, ddof=1) / x.mean(axis=0)                 # (nchan, nprod)
    expected = 1.0 / np.sqrt(n)
    # sampling error of a sample std of T near-Gaussian values: sigma / sqrt(2 (T - 1))
    err = expected / np.sqrt(2 * (x.shape[0] - 1)) / np.sqrt(rel.size)
    assert abs(rel.mean() - expected) < 5 * err


def test_gamma_draws_have_mean_mu_and_gamma_distribution(tmp_path):
    n = 512
    d, t, _ = _scan(tmp_path, emitters=[], ntime=300, nchan=40, accumulations=n, seed=5)
    r = d["data"].astype(np.float64) / t["mu"]
    # E[Gamma(N, mu/N)] = mu; standard error of the mean (1/sqrt(N)) / sqrt(samples)
    assert abs(r.mean() - 1.0) < 5 / np.sqrt(n) / np.sqrt(r.size)
    assert abs(r.std() - 1 / np.sqrt(n)) < 5 / np.sqrt(n) / np.sqrt(2 * r.size)
    # shape: Kolmogorov-Smirnov against scipy.stats.gamma(N, scale=1/N)
    sample = r[:, :, 0].ravel()
    assert stats.kstest(sample, stats.gamma(n, scale=1.0 / n).cdf).pvalue > 1e-3


def test_sk_of_s2_scan_has_mean_one_and_published_variance(tmp_path):
    m = 64
    d, t, _ = _scan(tmp_path, band="L", ntime=200, nchan=128, accumulations=m,
                    with_s2=True, seed=11)
    s1 = d["data"].astype(np.float64) * m                       # /data = S1 / M
    s2 = d["s2"].astype(np.float64)
    # generalized SK, Nita & Gary 2010 (docs/design.md 4), N = 1, d = 1:
    # SK = (M N d + 1)/(M - 1) * (M S2 / S1^2 - 1)
    sk = (m * 1 * 1.0 + 1) / (m - 1) * (m * s2 / s1 ** 2 - 1)
    clean = sk[t["kind"] == 0]
    # Var[SK] = 4 M^2 / ((M - 1)(M + 2)(M + 3)) (Nita et al. 2007)
    var = 4.0 * m * m / ((m - 1) * (m + 2) * (m + 3))
    assert abs(clean.mean() - 1.0) < 5 * np.sqrt(var / clean.size)
    assert abs(clean.var() / var - 1.0) < 0.05
    # carriers make SK low, pulses shorter than a dump make it high (strong samples)
    strong = t["inr"] > 5
    assert sk[strong & (t["kind"] == 1)].mean() < 0.9
    assert sk[strong & (t["kind"] == 2)].mean() > 1.5


def test_wishart_sum_auto_is_noncentral_chisquare():
    # One input: Q / sigma^2 * 2 ~ noncentral chi-square, 2n dof, nonc 2 n |s|^2 / sigma^2
    # (scipy.stats.ncx2 as the reference).
    rng = np.random.default_rng(1)
    n, count, sig2, s = 64, 40_000, 3.0, 0.8 + 0.3j
    q = wishart_sum(rng, np.full(count, n), np.full((count, 1, 1), sig2 + 0j),
                    np.full((count, 1), s))[:, 0, 0].real
    ref = stats.ncx2(2 * n, 2 * n * abs(s) ** 2 / sig2)
    assert stats.kstest(q * 2 / sig2, ref.cdf).pvalue > 1e-3


def test_wishart_sum_cross_moments():
    # Complex Wishart with n dof: E[W] = n Sigma, E|W_ab - n Sigma_ab|^2 = n Sigma_aa Sigma_bb
    # (second moments of the complex Wishart distribution, from memory).
    rng = np.random.default_rng(2)
    n, count = 32, 60_000
    sigma = np.array([[2.0, 0.6 + 0.8j], [0.6 - 0.8j, 1.5]])
    q = wishart_sum(rng, np.full(count, n), np.broadcast_to(sigma, (count, 2, 2)))
    mean = q.mean(axis=0)
    assert np.allclose(mean, n * sigma, atol=5 * n * 2 / np.sqrt(count))
    var = np.mean(np.abs(q[:, 0, 1] - n * sigma[0, 1]) ** 2)
    assert abs(var / (n * 2.0 * 1.5) - 1) < 0.05


# --------------------------------------------------------------------------- truth


@pytest.mark.parametrize("mode", ["auto", "cross", "s2"])
def test_truth_marks_exactly_where_interference_was_added(tmp_path, mode):
    kw = dict(band="L", ntime=96, nchan=128, seed=21, accumulations=128,
              cross=(mode == "cross"), with_s2=(mode == "s2"),
              feeds=("a",) if mode != "auto" else ("a", "b"))
    clean, _, _ = _scan(tmp_path, "clean", emitters=[], **kw)
    rfi, truth, _ = _scan(tmp_path, "rfi", emitters="default", **kw)
    hit = truth["kind"] > 0
    assert np.array_equal(hit, truth["inr"] > 0)
    assert hit.any() and (~hit).any()
    # same seed: identical wherever the truth says clean, different wherever it says hit
    assert np.array_equal(clean["data"][~hit], rfi["data"][~hit])
    assert np.all(clean["data"][hit] != rfi["data"][hit])
    assert set(json.loads(truth["attrs"]["kinds"]).values()) == KIND_NAMES


def test_truth_inr_of_single_emitters(tmp_path):
    n = 1024
    emitters = [
        {"kind": "carrier", "channel": 10, "inr": 7.0, "start": 20, "stop": 220},
        {"kind": "pulsed", "channels": [30, 34], "inr": 9.0, "duty": 0.1, "period": 2},
        {"kind": "noiselike", "channels": [50, 60], "inr": 4.0, "start": 100, "stop": 200},
        {"kind": "intermittent", "signal": "noise", "channel": 40, "inr": 3.0,
         "on_dumps": [[5, 15], [60, 70]]},
    ]
    d, t, _ = _scan(tmp_path, band="L", ntime=300, nchan=64, accumulations=n,
                    emitters=emitters, seed=4)
    inr, kind = t["inr"], t["kind"]
    expect = np.zeros(inr.shape, dtype=np.float32)
    expect[20:220, 10] = 7.0
    expect[0::2, 30:34] = 9.0
    expect[100:200, 50:60] = 4.0
    expect[5:15, 40] = expect[60:70, 40] = 3.0
    assert np.allclose(inr, expect)
    assert np.all(kind[20:220, 10] == 1) and np.all(kind[0::2, 30:34] == 2)
    assert np.all(kind[1::2, 30:34] == 0) and np.all(kind[100:200, 50:60] == 6)
    assert np.all(kind[60:70, 40] == 5) and np.all(kind[15:60, 40] == 0)
    # the excess power in units of the noise rms mu/sqrt(N) averages to the truth INR
    excess = (d["data"] - t["mu"]) / (t["mu"] / np.sqrt(n))
    for code, value in ((1, 7.0), (2, 9.0), (6, 4.0), (5, 3.0)):
        sel = excess[kind == code]
        assert abs(sel.mean() - value) < 5 * sel.std() / np.sqrt(sel.size)


def test_partial_channels_and_carrier_split(tmp_path):
    d0, _, _ = _scan(tmp_path, "grid", emitters=[], band="P", ntime=8, nchan=32)
    freq = d0["freq"]
    cw = d0["attrs"]["channel_width"]
    f_line = freq[5] + 0.25 * cw                     # a quarter channel above channel 5
    emitters = [{"kind": "carrier", "freq_hz": f_line, "inr": 8.0},
                {"kind": "noiselike", "freq_lo_hz": freq[20] - 0.5 * cw,
                 "freq_hi_hz": freq[22], "inr": 2.0}]
    _, t, _ = _scan(tmp_path, emitters=emitters, band="P", ntime=8, nchan=32)
    row = t["inr"][0, :, 0]
    # triangular channel response: 3/4 in channel 5, 1/4 in channel 6
    assert np.allclose(row[5:7], [6.0, 2.0]) and row[4] == 0 and row[7] == 0
    # band edge at the centre of channel 22: half of that channel covered
    assert np.allclose(row[20:23], [2.0, 2.0, 1.0]) and row[23] == 0


def test_dropped_dumps_zero_or_nan_and_marked(tmp_path):
    d, t, s = _scan(tmp_path, ntime=400, nchan=16, dropped_fraction=0.1, seed=8)
    dropped = t["dropped"]
    assert dropped.dtype == bool and dropped.sum() == s["dropped_dumps"] == 40
    x = d["data"][dropped]
    per_dump = np.isnan(x).all(axis=(1, 2)) | (x == 0).all(axis=(1, 2))
    assert per_dump.all()
    assert np.isnan(x).any() and (x == 0).any()
    assert np.all(np.isfinite(d["data"][~dropped])) and np.all(d["data"][~dropped] > 0)
    assert np.all(t["inr"][dropped] == 0) and np.all(t["kind"][dropped] == 0)


# --------------------------------------------------------------------------- layout


def test_scan_and_truth_files_follow_the_layout(tmp_path):
    d, t, s = _scan(tmp_path, ntime=64, nchan=32, upstream_flag_fraction=0.05,
                    start_time="2026-12-01T21:05:00Z", integration_time=2.0)
    shape = (64, 32, 4)
    assert d["data"].dtype == np.float32 and d["data"].shape == shape
    assert d["time"].dtype == np.float64 and d["time"].shape == (64,)
    assert np.allclose(np.diff(d["time"]), 2.0)
    # 2026-12-01T21:05:00Z = 1796159100 s since 1970 (calendar arithmetic); centre of dump 0
    assert d["time"][0] == 1796159100.0 + 1.0
    assert d["freq"].dtype == np.float64 and np.allclose(np.diff(d["freq"]),
                                                         d["attrs"]["channel_width"])
    assert d["products"] == ["pier1.a-pier1.a", "pier1.b-pier1.b", "pier2.a-pier2.a", "pier2.b-pier2.b"]
    assert d["flags"].dtype == np.uint8 and d["flags"].shape == shape
    assert 0.04 < d["flags"].astype(bool).mean() < 0.08
    a = d["attrs"]
    assert a["band"] == "L" and a["accumulations"] == 1024 and a["voltage"] == "complex"
    assert a["integration_time"] == 2.0 and a["channel_width"] > 0 and a["presum"] == 1
    lo, hi = d["freq"][0] - a["channel_width"] / 2, d["freq"][-1] + a["channel_width"] / 2
    assert 900e6 <= lo and hi <= 1670e6                         # L band, 900-1670 MHz
    assert "s2" not in d
    assert t["inr"].dtype == np.float32 and t["inr"].shape == shape
    assert t["kind"].dtype == np.uint8 and t["kind"].shape == shape
    assert t["dropped"].shape == (64,)
    assert t["attrs"]["scan"] == "qro_test_L" and t["attrs"]["seed"] == 0
    assert json.loads(t["attrs"]["kinds"]) == {"1": "carrier", "2": "pulsed", "3": "burst",
                                               "4": "drifting", "5": "intermittent",
                                               "6": "noiselike"}
    assert s["scan"] == "qro_test_L" and s["shape"] == shape


def test_cross_scan_is_complex64_with_real_autos(tmp_path):
    d, t, _ = _scan(tmp_path, cross=True, ntime=64, nchan=32, feeds=("a", "b"))
    assert d["data"].dtype == np.complex64
    assert d["products"] == ["pier1.a-pier1.a", "pier1.b-pier1.b", "pier2.a-pier2.a", "pier2.b-pier2.b",
                             "pier1.a-pier2.a", "pier1.b-pier2.b"]
    autos = _autos(d["products"])
    assert np.all(d["data"][..., autos].imag == 0) and np.all(d["data"][..., autos].real > 0)
    assert np.any(d["data"][..., 4].imag != 0)
    # the cross of an emitter seen equally by both inputs: sqrt(inr_a inr_b) = inr_a
    hit = t["inr"][..., 0] > 0
    assert np.allclose(t["inr"][..., 4][hit], t["inr"][..., 0][hit])


def test_s2_scan_layout_and_options(tmp_path):
    d, _, _ = _scan(tmp_path, with_s2=True, accumulations=64, ntime=16, nchan=16)
    assert d["s2"].dtype == np.float32 and d["s2"].shape == d["data"].shape
    # S2 >= S1^2 / M (Cauchy-Schwarz) for every dump
    s1 = d["data"].astype(np.float64) * 64
    assert np.all(d["s2"] >= s1 ** 2 / 64 * (1 - 1e-5))
    with pytest.raises(ValueError):
        simulate_scan(tmp_path / "x.h5", with_s2=True, cross=True)


def test_same_seed_same_files(tmp_path):
    a, _, _ = _scan(tmp_path, "a", ntime=32, nchan=32, seed=9, dropped_fraction=0.05)
    b, _, _ = _scan(tmp_path, "b", ntime=32, nchan=32, seed=9, dropped_fraction=0.05)
    c, _, _ = _scan(tmp_path, "c", ntime=32, nchan=32, seed=10, dropped_fraction=0.05)
    assert np.array_equal(a["data"], b["data"], equal_nan=True)
    assert not np.array_equal(a["data"], c["data"], equal_nan=True)


# --------------------------------------------------------------------------- writer


def test_writer_leaves_no_temporary_file(tmp_path):
    simulate_scan(tmp_path / "s.h5", tmp_path / "s.truth.h5", ntime=16, nchan=16)
    assert sorted(os.listdir(tmp_path)) == ["s.h5", "s.truth.h5"]


def test_failed_write_leaves_nothing(tmp_path, monkeypatch):
    def broken(values):
        raise OSError("disk full (simulated)")
    monkeypatch.setattr(simulate, "_strings", broken)
    with pytest.raises(OSError):
        simulate_scan(tmp_path / "s.h5", tmp_path / "s.truth.h5", ntime=16, nchan=16)
    assert os.listdir(tmp_path) == []


def test_bad_parameters_raise_before_writing(tmp_path):
    with pytest.raises(ValueError, match="band"):
        simulate_scan(tmp_path / "s.h5", band="X")
    with pytest.raises(ValueError, match="kind"):
        simulate_scan(tmp_path / "s.h5", emitters=[{"kind": "laser", "inr": 1}])
    with pytest.raises(ValueError, match="does not reach"):
        simulate_scan(tmp_path / "s.h5", emitters=[{"kind": "carrier", "freq_hz": 3e9,
                                                    "inr": 1}])
    with pytest.raises(ValueError, match="outside band"):
        simulate_scan(tmp_path / "s.h5", band="P", nchan=64, channel_width=10e6)
    assert os.listdir(tmp_path) == []


# --------------------------------------------------------------------------- inject


def _brute_dumps(rng, n, count, mu, pulse_level=0.0, n_p=0, carrier=0.0):
    """Dump means straight from the definition: N raw spectra |s + n_k|^2 of complex
    Gaussian voltages, the first n_p of them with extra noise power pulse_level."""
    level = np.full((count, n), mu)
    level[:, :n_p] += pulse_level
    v = np.sqrt(carrier) + np.sqrt(level / 2) * (rng.standard_normal((count, n))
                                                 + 1j * rng.standard_normal((count, n)))
    return np.mean(np.abs(v) ** 2, axis=1)


@pytest.mark.parametrize("kind", ["carrier", "pulsed", "noiselike"])
def test_inject_matches_brute_force(kind):
    rng = np.random.default_rng(7)
    n, mu, inr, count = 64, 5.0, 6.0, 20_000
    clean = mu * rng.standard_gamma(n, size=(count, 1)) / n
    out, truth = inject(clean, kind, rng=rng, accumulations=n, inr=inr, duty=0.125,
                        mu=np.full(clean.shape, mu))
    assert out.shape == clean.shape
    assert np.all(truth == inr)
    excess = inr * mu / np.sqrt(n)
    if kind == "carrier":
        ref = _brute_dumps(rng, n, count, mu, carrier=excess)
    elif kind == "pulsed":
        n_p = 8
        ref = _brute_dumps(rng, n, count, mu, pulse_level=excess * n / n_p, n_p=n_p)
    else:
        ref = _brute_dumps(rng, n, count, mu + excess)
    assert stats.ks_2samp(out[:, 0], ref).pvalue > 1e-3
    if kind == "carrier":
        # exact law: mu / (2N) x noncentral chi-square, 2N dof, nonc 2N c / mu (scipy.stats)
        law = stats.ncx2(2 * n, 2 * n * excess / mu)
        assert stats.kstest(out[:, 0] * 2 * n / mu, law.cdf).pvalue > 1e-3
    assert abs(out.mean() - (mu + excess)) < 5 * ref.std() / np.sqrt(count)


def test_inject_is_pure_and_marks_region():
    rng = np.random.default_rng(3)
    data = rng.standard_gamma(256, size=(50, 20, 2)).astype(np.float32) / 256
    before = data.copy()
    out, truth = inject(data, "burst", rng=rng, accumulations=256, inr=5.0,
                        dumps=slice(10, 13), products=[1])
    assert np.array_equal(data, before) and out.dtype == np.float32
    assert np.array_equal(truth > 0, np.isin(np.arange(50), [10, 11, 12])[:, None, None]
                          & np.array([False, True])[None, None, :] & np.ones((1, 20, 1), bool))
    assert np.allclose(out[10:13, :, 1], data[10:13, :, 1] * (1 + 5.0 / 16))
    assert np.array_equal(out[truth == 0], data[truth == 0])


# --------------------------------------------------------------------------- night, CLI


def test_small_night(tmp_path):
    result = simulate_night(tmp_path, ntime=48, nchan=64, seed=1)
    scans = result["scans"]
    assert len(scans) == 6
    assert [s["band"] for s in scans] == ["L", "P"] * 3
    assert scans[0]["scan"] == "qro_20261201_2105_L"
    starts = [s["start_time"] for s in scans]
    assert all(b > a for a, b in zip(starts, starts[1:]))
    assert all(b >= a["stop_time"] for a, b in zip(scans, starts[1:]))
    kinds = set()
    for s in scans:
        assert (tmp_path / "scans" / f"{s['scan']}.h5").exists()
        assert (tmp_path / "truth" / f"{s['scan']}.truth.h5").exists()
        kinds |= set(s["kinds"])
    assert kinds == KIND_NAMES
    assert sum(s["dtype"] == "complex64" for s in scans) == 1
    assert sum(s["s2"] for s in scans) == 1
    assert any(s["dropped_dumps"] for s in scans)
    assert any(s["upstream_flagged_fraction"] for s in scans)


def test_cli_subcommand(tmp_path, capsys):
    parser = argparse.ArgumentParser(prog="rfisieve")
    register_cli(parser.add_subparsers(dest="command"))
    with pytest.raises(SystemExit):
        parser.parse_args(["simulate", "--help"])
    help_text = capsys.readouterr().out
    for option in ("OUTDIR", "--scans", "--dumps", "--channels", "--seed", "--s2"):
        assert option in help_text
    args = parser.parse_args(["simulate", str(tmp_path / "out"), "--scans", "2",
                              "--dumps", "16", "--channels", "32", "--seed", "4"])
    assert args.func(args) == 0
    printed = capsys.readouterr().out
    assert "wrote 2 scans" in printed and str(tmp_path / "out" / "scans") in printed
    assert len(os.listdir(tmp_path / "out" / "truth")) == 2
