"""Run and band configs: the shipped files validate; every problem is one line
naming the file and the key (checks against the schemas and settings.py)."""

from pathlib import Path

import pytest
import yaml

from rfisieve.config import load as config

from rfisieve.config import defaults as settings
from rfisieve.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
BANDS_DIR = ROOT / "config" / "bands"
SHIPPED_BANDS = ("P", "L", "C")


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
    for key in ("inputs", "outdir", "chunk_dumps", "workers"):  # docs/design.md 3.4 contract
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


def _schema(name):
    return yaml.safe_load((ROOT / "src" / "rfisieve" / "data" / name).read_text())


def test_schemas_cover_the_settings_keys():
    run_schema = _schema("config.schema.yaml")
    assert set(run_schema["properties"]) == set(settings.RUN_DEFAULTS)
    assert set(run_schema["properties"]["layout"]["properties"]) == set(settings.RUN_DEFAULTS["layout"])
    band_schema = _schema("band.schema.yaml")
    assert set(band_schema["properties"]) == set(settings.BAND_DEFAULTS)
    for key, default in settings.BAND_DEFAULTS.items():
        if isinstance(default, dict):
            assert set(band_schema["properties"][key]["properties"]) == set(default), key


@pytest.mark.parametrize("name", ["config.schema.yaml", "band.schema.yaml"])
def test_every_setting_has_its_default_in_the_schema(name):
    # One source of truth: every leaf key carries `default:`, every section `default: {}`
    # (so that Snakemake's validate fills nested sections too).
    def walk(node, where):
        for key, sub in node["properties"].items():
            assert "default" in sub, f"{where}{key}"
            if sub.get("type") == "object" and "properties" in sub:
                assert sub["default"] == {}, f"{where}{key}"
                walk(sub, f"{where}{key}.")
    walk(_schema(name), "")


def test_schemas_ship_once_from_the_package():
    assert not (ROOT / "workflow" / "schemas").exists()
    for name in config.SCHEMA_NAMES:
        assert config.schema_path(name).is_file()
        assert config.schema_path(name).parent == ROOT / "src" / "rfisieve" / "data"
    assert 'rfconfig.schema_path("config.schema.yaml")' in (ROOT / "Snakefile").read_text()


def test_snakemake_validate_fills_the_schema_defaults():
    # Snakemake's own validate (the Snakefile's) gives the same run settings as ours.
    from snakemake.utils import validate as snakemake_validate

    data = {"outdir": "x", "layout": {"data": "/vis"}}
    snakemake_validate(data, str(config.schema_path("config.schema.yaml")))
    assert data == settings.run_settings({"outdir": "x", "layout": {"data": "/vis"}})


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


def test_set_errors_blame_set_not_the_config_file(tmp_path):
    path = _write(tmp_path / "run.yaml", {"workers": 3})
    message = _error(config.load_run_config, path, config.parse_set(["chunk_dump=100"]))
    assert message.startswith("--set:") and "chunk_dump" in message and str(path) not in message
    message = _error(config.load_run_config, path, config.parse_set(["chunk_dumps=zero"]))
    assert message.startswith("--set:") and "chunk_dumps" in message
    # a bad file is still blamed on the file, overrides or not
    bad = _write(tmp_path / "bad.yaml", {"workers": 0})
    assert _error(config.load_run_config, bad, {"chunk_dumps": 8}).startswith(str(bad))


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
    # enums are enums: a misspelt method is refused here, not by a detect job's traceback
    ({"kurtosis": {"method": "exakt"}}, ["kurtosis.method", "one of", "'exact'", "'pearson3'"]),
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
    assert "'Ku'" in message and "C, L, P" in message


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


def test_brace_in_a_scan_name_is_refused(tmp_path):
    (tmp_path / "scan{1}.h5").write_bytes(b"")
    message = _error(config.expand_inputs, str(tmp_path / "*.h5"))
    assert "scan{1}.h5" in message and "braces" in message
    assert "braces" in _error(config.load_run_config, None, {"outdir": "out{x}"})


# -- duplicate keys ------------------------------------------------------------------
def test_duplicate_keys_refused_in_a_band_config(tmp_path):
    text = (BANDS_DIR / "L.yaml").read_text().replace("band: L", "band: X")
    text = text.replace("  rho: 1.5", "  rho: 1.5\n  rho: 2.0", 1)
    path = _write(tmp_path / "X.yaml", text)
    message = _error(config.load_band, tmp_path, "X")
    line = next(i for i, ln in enumerate(text.splitlines(), 1) if ln.startswith("  rho: 2.0"))
    assert message.startswith(str(path)) and "duplicate key 'rho'" in message and f"line {line}" in message


def test_duplicate_keys_refused_in_a_run_config(tmp_path):
    path = _write(tmp_path / "run.yaml", "workers: 2\noutdir: a\nworkers: 4\n")
    message = _error(config.load_run_config, path)
    assert message.startswith(str(path)) and "duplicate key 'workers'" in message
    assert "duplicate key" in _error(config.check_config_files, [path])


def test_duplicate_keys_refused_in_the_emitter_list(tmp_path):
    entry = "  - {name: a, start_mhz: 1, stop_mhz: 2, kind: emitter, source: x}\n"
    path = _write(tmp_path / "e.yaml", "emitters:\n" + entry + "emitters:\n" + entry)
    assert "duplicate key 'emitters'" in _error(config.load_emitter_list, path)


def test_yaml_merge_keys_may_still_be_overridden():
    assert config.parse_yaml("a: &x {p: 1, q: 2}\nb:\n  <<: *x\n  p: 3\n") == {
        "a": {"p": 1, "q": 2}, "b": {"p": 3, "q": 2}}


# -- emitter list ----------------------------------------------------------------------
def test_shipped_emitter_list_validates():
    data = config.load_emitter_list(ROOT / "config" / "emitters.yaml")
    assert data["emitters"] and all(e["source"] for e in data["emitters"])


@pytest.mark.parametrize("entry, words", [
    ({"name": "a", "start_mhz": 1, "stop_mhz": 2, "kind": "beacon", "source": "x"}, ["kind", "one of"]),
    ({"name": "a", "start_mhz": 1, "stop_mhz": 2, "kind": "emitter"}, ["source"]),
    ({"name": "a", "start_mhz": 3, "stop_mhz": 2, "kind": "emitter", "source": "x"}, ["start_mhz"]),
    ({"name": "a", "start_mhz": 1, "stop_mhz": 2, "kind": "emitter", "source": "x", "url": "y"}, ["'url'"]),
])
def test_bad_emitter_entry_names_file_and_key(tmp_path, entry, words):
    path = _write(tmp_path / "e.yaml", {"emitters": [entry]})
    message = _error(config.load_emitter_list, path)
    assert message.startswith(str(path))
    for word in words:
        assert word in message, message


# -- comment-keeping edits ---------------------------------------------------------------
def test_set_yaml_values_keeps_comments():
    text = (BANDS_DIR / "L.yaml").read_text()
    new = config.set_yaml_values(text, {("sumthreshold", "chi1"): 7.5, ("growth", "eta"): 0.2})
    old_lines, new_lines = text.splitlines(), new.splitlines()
    changed = [(a, b) for a, b in zip(old_lines, new_lines) if a != b]
    assert len(old_lines) == len(new_lines) and len(changed) == 2
    for a, b in changed:
        assert a.split("#", 1)[1] == b.split("#", 1)[1]  # the unit comment stays
    data = yaml.safe_load(new)
    assert data["sumthreshold"]["chi1"] == 7.5 and data["growth"]["eta"] == 0.2
    assert data["kurtosis"] == yaml.safe_load(text)["kurtosis"]
