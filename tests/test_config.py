"""Run and band configs: the shipped files validate; every problem is one line
naming the file and the key (checks against the schemas and settings.py)."""

import filecmp
from pathlib import Path

import pytest
import yaml

from rfisieve.config import load as config

from rfisieve.config import defaults as settings
from rfisieve.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
BANDS_DIR = ROOT / "config" / "bands"
SHIPPED_BANDS = ("UHF", "L", "S")


def _write(path, data):
    path.write_text(yaml.safe_dump(data) if not isinstance(data, str) else data)
    return path


def _error(fn, *args, **kwargs):
    with pytest.raises(ConfigError) as info:
        fn(*args, **kwargs)
    message = str(info.value)
    assert "\n" not in message, message
    return message


# -- shipped files ---------------------------------------------------------------
def test_shipped_run_config_validates():
    run = config.load_run_config(ROOT / "config" / "config.yaml")
    assert set(run) == set(settings.RUN_DEFAULTS)
    for key in ("inputs", "outdir", "chunk_dumps", "workers"):  # DESIGN.md 2.4 contract
        assert key in run


@pytest.mark.parametrize("band", SHIPPED_BANDS)
def test_shipped_band_configs_validate_and_set_every_key(band):
    full, source = config.load_band(BANDS_DIR, band)
    assert full["band"] == band
    assert source["path"].endswith(f"{band}.yaml") and "kurtosis" in source["text"]
    raw = yaml.safe_load((BANDS_DIR / f"{band}.yaml").read_text())
    # Every detector setting of BAND_DEFAULTS is written out in the shipped file.
    for key, default in settings.BAND_DEFAULTS.items():
        assert key in raw, f"{band}.yaml lacks {key}"
        if isinstance(default, dict):
            assert set(raw[key]) == set(default), f"{band}.yaml {key}"
    assert raw["known_bad"], "every shipped band has known-bad ranges"
    assert all(e["source"] for e in raw["emitters"])


def test_schemas_cover_the_settings_keys():
    run_schema = yaml.safe_load((ROOT / "workflow/schemas/config.schema.yaml").read_text())
    assert set(run_schema["properties"]) == set(settings.RUN_DEFAULTS)
    assert set(run_schema["properties"]["layout"]["properties"]) == set(settings.RUN_DEFAULTS["layout"])
    band_schema = yaml.safe_load((ROOT / "workflow/schemas/band.schema.yaml").read_text())
    assert set(band_schema["properties"]) == set(settings.BAND_DEFAULTS)
    for key, default in settings.BAND_DEFAULTS.items():
        if isinstance(default, dict):
            assert set(band_schema["properties"][key]["properties"]) == set(default), key


@pytest.mark.parametrize("name", config.SCHEMA_NAMES)
def test_packaged_schema_copy_is_identical(name):
    # The installed package reads src/rfisieve/data/; Snakemake reads workflow/schemas/.
    assert filecmp.cmp(ROOT / "workflow" / "schemas" / name,
                       ROOT / "src" / "rfisieve" / "data" / name, shallow=False)


# -- bad run configs --------------------------------------------------------------
@pytest.mark.parametrize("override, words", [
    ({"workers": 0}, ["workers", ">= 1"]),
    ({"chunk_dumps": "many"}, ["chunk_dumps", "integer"]),
    ({"scheduler": "gpu"}, ["scheduler", "tcp://host:port"]),
    ({"layout": {"axes": ["time", "chan", "product"]}}, ["layout.axes[1]", "'freq'"]),
    ({"inputs": 5}, ["inputs", "glob"]),
])
def test_bad_run_value_names_file_and_key(tmp_path, override, words):
    path = _write(tmp_path / "run.yaml", settings.merge({"outdir": "x"}, override))
    message = _error(config.load_run_config, path)
    assert message.startswith(str(path))
    for word in words:
        assert word in message, message


def test_unknown_run_key_lists_allowed(tmp_path):
    path = _write(tmp_path / "run.yaml", {"outdir": "x", "chunk_dump": 64})
    message = _error(config.load_run_config, path)
    assert str(path) in message and "'chunk_dump'" in message and "chunk_dumps" in message


def test_unknown_layout_key(tmp_path):
    path = _write(tmp_path / "run.yaml", {"layout": {"visibilities": "/vis"}})
    message = _error(config.load_run_config, path)
    assert "'visibilities'" in message and "in layout" in message


def test_unparsable_and_non_mapping_run_config(tmp_path):
    assert "line" in _error(config.load_run_config, _write(tmp_path / "a.yaml", "a: [1, 2\n"))
    assert "mapping" in _error(config.load_run_config, _write(tmp_path / "b.yaml", "- 1\n- 2\n"))
    assert "cannot read" in _error(config.load_run_config, tmp_path / "missing.yaml")


def test_overrides_win_and_are_validated(tmp_path):
    path = _write(tmp_path / "run.yaml", {"workers": 3})
    assert config.load_run_config(path, {"workers": 5})["workers"] == 5
    assert "workers" in _error(config.load_run_config, path, {"workers": -1})


def test_parse_set():
    assert config.parse_set(["chunk_dumps=64", "layout.data=/vis", "previous_run="]) == {
        "chunk_dumps": 64, "layout": {"data": "/vis"}, "previous_run": None}
    assert "KEY=VALUE" in _error(config.parse_set, ["chunk_dumps"])


# -- bad band configs --------------------------------------------------------------
def _band_dir(tmp_path, band, **changes):
    data = yaml.safe_load((BANDS_DIR / "L.yaml").read_text())
    data["band"] = band
    data = settings.merge(data, changes)
    _write(tmp_path / f"{band}.yaml", data)
    return tmp_path


@pytest.mark.parametrize("changes, words", [
    ({"sumthreshold": {"rho": 0.5}}, ["sumthreshold.rho", "> 1"]),
    ({"kurtosis": {"pfa": 0.7}}, ["kurtosis.pfa", "< 0.5"]),
    ({"growth": {"eta": 1.5}}, ["growth.eta", "<= 1"]),
    ({"sumthreshold": {"max_window_time": 48}}, ["sumthreshold.max_window_time", "one of"]),
    ({"kurtosis": {"enabled": "yes please"}}, ["kurtosis.enabled", "boolean"]),
    ({"known_bad": [{"start_mhz": 900.0, "stop_mhz": 950.0}]}, ["known_bad[0]", "reason"]),
    ({"known_bad": [{"start_mhz": 950.0, "stop_mhz": 900.0, "reason": "x"}]}, ["known_bad[0]", "below"]),
])
def test_bad_band_value_names_file_and_key(tmp_path, changes, words):
    bands = _band_dir(tmp_path, "X", **changes)
    message = _error(config.load_band, bands, "X")
    assert message.startswith(str(bands / "X.yaml"))
    for word in words:
        assert word in message, message


def test_unknown_band_key_is_an_error(tmp_path):
    bands = _band_dir(tmp_path, "X", kurtosis={"sigmaa": 3.0})
    message = _error(config.load_band, bands, "X")
    assert "'sigmaa'" in message and "in kurtosis" in message and "sigma" in message


def test_band_name_must_match_file(tmp_path):
    bands = _band_dir(tmp_path, "X")
    (bands / "X.yaml").rename(bands / "Y.yaml")
    assert "'X'" in _error(config.load_band, bands, "Y")


def test_unknown_band_lists_configured_bands():
    message = _error(config.load_band, BANDS_DIR, "Ku")
    assert "'Ku'" in message and "L, S, UHF" in message


def test_partial_band_config_takes_defaults(tmp_path):
    _write(tmp_path / "K.yaml", {"band": "K", "kurtosis": {"sigma": 4.0}})
    full, _ = config.load_band(tmp_path, "K")
    assert full["kurtosis"]["sigma"] == 4.0
    assert full["sumthreshold"] == settings.BAND_DEFAULTS["sumthreshold"]


# -- inputs -----------------------------------------------------------------------
def test_expand_inputs(tmp_path):
    for name in ("b.h5", "a.h5"):
        (tmp_path / name).write_bytes(b"")
    assert [Path(p).name for p in config.expand_inputs(str(tmp_path / "*.h5"))] == ["a.h5", "b.h5"]
    assert "matches no file" in _error(config.expand_inputs, str(tmp_path / "none*.h5"))
    assert "no such scan file" in _error(config.expand_inputs, [str(tmp_path / "c.h5")])
    assert "no scans" in _error(config.expand_inputs, [])
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "a.h5").write_bytes(b"")
    assert "two scans named 'a'" in _error(config.expand_inputs, [str(tmp_path / "*.h5"), str(tmp_path / "sub/a.h5")])
