"""rfisieve tune: the sweep writes <band>.suggested.yaml into --out (comments of the
band config kept) and leaves the band config and the input scans byte-identical; the injection helper."""

import hashlib
import shutil
from pathlib import Path

import numpy as np
import yaml

from rfisieve.evaluate.inject import add_interference, plan_injections, robust_rms, truth_planes
from rfisieve.evaluate.tune import suggest, sweep_values
from scanfactory import make_scan

REPO = Path(__file__).resolve().parents[1]


def _sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def test_tune_writes_suggestion_and_touches_nothing(tmp_path, capsys):
    from rfisieve.cli import main

    bands = tmp_path / "bands"
    bands.mkdir()
    shutil.copy(REPO / "config" / "bands" / "L.yaml", bands / "L.yaml")
    scan = tmp_path / "qro_tune_L.h5"
    make_scan(scan, ntime=256, nchan=32, nprod=2, seed=5)
    before = {p: _sha(p) for p in (bands / "L.yaml", scan)}
    rc = main(["tune", "--band", "L", "--scans", str(scan), "--bands-dir", str(bands),
               "--out", str(tmp_path / "out"), "--values", "3", "--max-dumps", "256"])
    assert rc == 0
    for p, h in before.items():
        assert _sha(p) == h, f"{p} was modified"
    sugg = tmp_path / "out" / "L.suggested.yaml"  # where --out says
    assert sugg.is_file()
    text = sugg.read_text()
    assert text.startswith("# Suggested band config for band L")
    # the band file's unit comments are kept
    for line in (bands / "L.yaml").read_text().splitlines():
        if line.lstrip().startswith(("chi1:", "sigma:", "eta:")):
            assert "#" + line.split("#", 1)[1] in text
    data = yaml.safe_load(text)
    assert data["band"] == "L"
    for section, key in (("sumthreshold", "chi1"), ("kurtosis", "sigma"), ("growth", "eta")):
        assert isinstance(data[section][key], float)
    # the suggestion is a valid band config
    from rfisieve.config.load import load_band_file

    load_band_file(sugg, "L")
    assert (tmp_path / "out" / "tune_L.png").stat().st_size > 0
    assert sorted(p.name for p in bands.iterdir()) == ["L.yaml"]
    out = capsys.readouterr().out
    assert "occupancy" in out and "recall" in out


def test_tune_refuses_scans_of_another_band(tmp_path, capsys):
    from rfisieve.cli import main

    bands = tmp_path / "bands"
    bands.mkdir()
    shutil.copy(REPO / "config" / "bands" / "L.yaml", bands / "L.yaml")
    scan = tmp_path / "qro_tune_S.h5"
    make_scan(scan, ntime=64, nchan=8, nprod=1, band="C", lines=False)
    assert main(["tune", "--band", "L", "--scans", str(scan), "--bands-dir", str(bands)]) == 2
    assert "band 'C'" in capsys.readouterr().err
    assert not (bands / "L.suggested.yaml").exists()


def test_sweep_values_centred_on_current():
    assert sweep_values("sumthreshold", "chi1", 6.0, 5) == [4.5, 5.25, 6.0, 6.75, 7.5]
    assert sweep_values("kurtosis", "sigma", 3.5, 3) == [3.0, 3.5, 4.0]
    assert sweep_values("growth", "eta", 0.0, 3) == [0.0, 0.1]


def test_suggest_rule():
    # occupancy floor 1.0 %; budget 0.3 %: values with occupancy <= 1.3 % are allowed.
    rows = [{"value": 4.5, "occupancy": 0.020, "recall": 0.99},
            {"value": 5.25, "occupancy": 0.0125, "recall": 0.97},
            {"value": 6.0, "occupancy": 0.011, "recall": 0.95},
            {"value": 7.5, "occupancy": 0.010, "recall": 0.90}]
    assert suggest(rows, 6.0, -1, 0.003) == 5.25
    # equal recall: the current value stays
    rows[1]["recall"] = 0.95
    assert suggest(rows, 6.0, -1, 0.003) == 6.0
    # the current value is over the budget: the best allowed, conservative first
    assert suggest(rows, 4.5, -1, 0.003) == 6.0
    # eta: higher is more sensitive
    eta_rows = [{"value": 0.1, "occupancy": 0.010, "recall": 0.90},
                {"value": 0.2, "occupancy": 0.012, "recall": 0.93},
                {"value": 0.3, "occupancy": 0.016, "recall": 0.96}]
    assert suggest(eta_rows, 0.2, +1, 0.003) == 0.2


def test_robust_rms_of_gamma_noise():
    # Radiometer equation: dump powers Gamma(N, 1/N) have rms 1/sqrt(N) (Wilson, Rohlfs &
    # Huettemeister, Tools of Radio Astronomy); a smooth bandpass does not change it.
    rng = np.random.default_rng(2)
    n = 400
    bp = np.linspace(1.0, 1.1, 16)
    x = rng.standard_gamma(n, size=(20000, 16)) / n
    rms = robust_rms(x * bp + np.linspace(0, 0.01, 20000)[:, None])
    np.testing.assert_allclose(rms, bp / np.sqrt(n), rtol=0.03)


def test_injected_excess_power_is_inr_times_rms():
    rng = np.random.default_rng(3)
    inj = plan_injections(300, 40, rng, levels=(1.0, 2.0, 5.0), fraction=0.02)
    inr, kind = truth_planes((300, 40), inj)
    assert set(np.unique(inr)) <= {0.0, 1.0, 2.0, 5.0}
    assert 0.01 < np.mean(inr > 0) < 0.1
    assert set(np.unique(kind[inr > 0])) <= {1, 3, 5}
    data = np.ones((300, 40), np.float32)
    rms = np.full(40, 0.05)
    s2 = np.full((300, 40), 100.0 * 1.0, np.float32)  # M = 100 raw powers of 1: S2 = 100
    new, new_s2 = add_interference(data, inr, rms, auto=True, s2=s2, accumulations=100)
    np.testing.assert_allclose(new - data, inr * 0.05, atol=1e-6)
    # sum over M raw powers of (1 + c)^2 = M (1 + c)^2, by definition of S2
    np.testing.assert_allclose(new_s2, 100 * (1 + inr * 0.05) ** 2, rtol=1e-5)
    vis = np.full((300, 40), 0.3 + 0.4j, np.complex64)
    new_v, _ = add_interference(vis, inr, rms, auto=False)
    np.testing.assert_allclose(np.abs(new_v), 0.5 + inr * 0.05, rtol=1e-5)
    np.testing.assert_allclose(np.angle(new_v), np.angle(vis), atol=1e-5)
