"""The `rfisieve` command: help texts, thresholds, inspect, one-line errors."""

import subprocess
import sys

import h5py
import numpy as np
import pytest

from conftest import ROOT, tool_env
from rfisieve import cli
from scanfactory import make_scan


def _rfisieve(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "rfisieve.cli", *args], capture_output=True, text=True,
                          env=tool_env(), cwd=cwd or ROOT, timeout=120)


def _subcommands():
    parser = cli.build_parser()
    action = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return sorted(action.choices)


def test_top_level_help_lists_commands():
    res = _rfisieve("--help")
    assert res.returncode == 0, res.stderr
    for name in cli.OWN_COMMANDS:
        assert name in res.stdout


def test_own_commands_are_all_there():
    assert set(cli.OWN_COMMANDS) <= set(_subcommands())


@pytest.mark.parametrize("command", _subcommands())
def test_every_subcommand_has_help(command, capsys):
    with pytest.raises(SystemExit) as info:
        cli.main([command, "--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    assert f"rfisieve {command}" in out and len(out.splitlines()) > 3


def test_thresholds_prints_the_published_values(capsys):
    # Nita & Gary 2010, PASP 122, 595, Table 1: M = 300, N = 10, d = 1, 3 sigma,
    # Pearson type III thresholds 0.76754 and 1.28212.
    assert cli.main(["thresholds", "--m", "300", "--n", "10", "--sigma", "3", "--method", "pearson3", "-q"]) == 0
    lower, upper = map(float, capsys.readouterr().out.split())
    assert lower == pytest.approx(0.76754, abs=5e-5)
    assert upper == pytest.approx(1.28212, abs=5e-5)


def test_thresholds_with_pfa(capsys):
    assert cli.main(["thresholds", "--m", "64", "--pfa", "0.001"]) == 0
    out = capsys.readouterr().out
    lower = float(out.split("lower")[1].split()[0])
    upper = float(out.split("upper")[1].split()[0])
    assert 0 < lower < 1 < upper  # E[SK] = 1 lies between the thresholds (Nita & Gary 2010)


def test_thresholds_bad_input_is_one_line():
    res = _rfisieve("thresholds", "--m", "64", "--pfa", "0.001", "--method", "guess")
    assert res.returncode == 2
    assert res.stderr.startswith("rfisieve: error:") and len(res.stderr.strip().splitlines()) == 1


def test_inspect_a_scan(tmp_path, capsys):
    path = tmp_path / "q-scan.h5"
    make_scan(path, ntime=40, nchan=16, nprod=2, cross=True, upstream=True, band="L")
    assert cli.main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    # make_scan: 40 dumps of 2 s from 1.8e9 s (2027-01-15T08:00:00Z), channels of
    # 500 kHz from 1400 MHz, 256 accumulations, first 10 dumps flagged upstream.
    assert "40 x 16 x 3" in out and "complex64" in out
    assert "L" in out.split("band")[1].split("\n")[0]
    assert "auto products" in out and "2 (pier1.a-pier1.a, pier2.a-pier2.a)" in out
    assert "1 (pier1.a-pier2.a)" in out
    assert "2027-01-15T08:00:00Z to 2027-01-15T08:01:18Z" in out
    assert "1400.0000 to 1407.5000 MHz" in out and "500 kHz" in out
    assert "256 raw spectra" in out
    assert "25.000 % flagged" in out
    assert "absent" in out


def test_inspect_json_gives_numbers_under_plain_keys(tmp_path, capsys):
    import json

    path = tmp_path / "s.h5"
    make_scan(path, ntime=20, nchan=8, nprod=1, s2=True, accumulations=16)
    assert cli.main(["inspect", "--json", str(path)]) == 0
    info = json.loads(capsys.readouterr().out)
    # make_scan: 20 dumps of 2 s from 1.8e9 s, 8 channels of 500 kHz from 1400 MHz
    assert (info["ntime"], info["nchan"], info["nprod"]) == (20, 8, 1)
    assert info["duration_s"] == 38.0 and info["integration_time_s"] == 2.0
    assert info["freq_min_hz"] == 1.40e9 and info["channel_width_hz"] == 500e3
    assert info["accumulations"] == 16 and info["has_s2"] is True and info["gaps"] == []
    assert info["auto_products"] == ["pier1.a-pier1.a"] and info["upstream_flagged_fraction"] is None
    assert all(" " not in key for key in info)


def test_run_config_option_has_one_name(tmp_path):
    # --run-config everywhere; run's old --config-file still works but is not shown.
    for command in ("run", "inspect", "plan", "detect", "merge"):
        res = _rfisieve(command, "--help")
        assert "--run-config" in res.stdout and "--config-file" not in res.stdout, command
    cfg = tmp_path / "run.yaml"
    cfg.write_text("workers: 3\n")
    scan = tmp_path / "a.h5"
    make_scan(scan, ntime=10, nchan=8, nprod=1)
    for option in ("--run-config", "--config-file"):
        args = cli.build_parser(plugins=False).parse_args(["run", option, str(cfg), "--inputs", str(scan)])
        assert args.run_config == str(cfg)


def test_required_options_show_no_default_none():
    for command in _subcommands():
        res = _rfisieve(command, "--help")
        assert "default: None" not in res.stdout, command


def test_a_subcommand_module_that_fails_to_import_is_loud(tmp_path):
    # A broken install must not look like a missing command.
    (tmp_path / "rfisieve_broken_plugin.py").write_text("import numpy\nraise ImportError('half installed')\n")
    code = ("import sys; from rfisieve import cli; "
            "cli.PLUGIN_MODULES = cli.PLUGIN_MODULES + ('rfisieve_broken_plugin',); "
            "sys.exit(cli.main(sys.argv[1:]))")
    env = tool_env()
    env["PYTHONPATH"] = str(tmp_path)
    res = subprocess.run([sys.executable, "-c", code, "--help"], capture_output=True, text=True, env=env,
                         cwd=ROOT, timeout=120)
    _one_line_error(res, "rfisieve_broken_plugin", "half installed", "reinstall")


def test_simulate_into_a_non_empty_folder_refuses_without_force(tmp_path):
    out = tmp_path / "night"
    out.mkdir()
    (out / "notes.txt").write_text("an earlier night\n")
    args = ["simulate", str(out), "--scans", "1", "--dumps", "16", "--channels", "16", "--quiet"]
    _one_line_error(_rfisieve(*args), str(out), "not empty", "--force")
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]
    res = _rfisieve(*args, "--force")
    assert res.returncode == 0, res.stderr
    assert "wrote 1 scan to" in res.stdout  # not "1 scans"


def _one_line_error(res, *words):
    assert res.returncode == 2, (res.stdout, res.stderr)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("rfisieve: error: "), res.stderr
    assert "Traceback" not in res.stderr
    for word in words:
        assert word in lines[0]


def test_corrupt_scan_is_a_one_line_error(tmp_path):
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"this is not HDF5" * 100)
    _one_line_error(_rfisieve("inspect", str(junk)), str(junk))


def test_truncated_scan_is_a_one_line_error(tmp_path):
    path = tmp_path / "cut.h5"
    make_scan(path, ntime=200, nchan=64, nprod=2)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    _one_line_error(_rfisieve("inspect", str(path)), str(path))


def test_scan_without_band_is_a_one_line_error(tmp_path):
    path = tmp_path / "noband.h5"
    make_scan(path, ntime=10, nchan=8, nprod=1)
    with h5py.File(path, "a") as f:
        del f.attrs["band"]
    _one_line_error(_rfisieve("plan", str(path)), str(path), "band")


def test_missing_glob_is_a_one_line_error(tmp_path):
    pattern = str(tmp_path / "nothing" / "*.h5")
    _one_line_error(_rfisieve("run", "--inputs", pattern, "--outdir", str(tmp_path / "out"), "--dry-run"),
                    "matches no file")


def test_bad_run_override_is_a_one_line_error(tmp_path):
    path = tmp_path / "a.h5"
    make_scan(path, ntime=10, nchan=8, nprod=1)
    _one_line_error(_rfisieve("run", "--inputs", str(path), "--set", "workers=0", "--dry-run"), "workers")


def test_set_error_is_blamed_on_set(tmp_path):
    path = tmp_path / "a.h5"
    make_scan(path, ntime=10, nchan=8, nprod=1)
    res = _rfisieve("run", "--inputs", str(path), "--set", "chunk_dump=100", "--dry-run")
    _one_line_error(res, "--set", "chunk_dump")
    assert "config/config.yaml" not in res.stderr


def test_run_builds_a_resumable_snakemake_command(tmp_path, capsys):
    path = tmp_path / "a.h5"
    make_scan(path, ntime=10, nchan=8, nprod=1)
    assert cli.main(["run", "--inputs", str(path), "--outdir", str(tmp_path / "out"), "--cores", "3",
                     "--print-command", "--", "--quiet"]) == 0
    out = capsys.readouterr().out
    for word in ("-m snakemake", "--rerun-incomplete", "--cores 3", "workflow/profiles/local",
                 f'outdir="{tmp_path / "out"}"' , "--quiet"):
        assert word in out, out


def test_stage_commands_make_a_mask(tmp_path):
    # plan -> detect (both detectors) -> merge, as the workflow rules call them.
    scan = tmp_path / "q.h5"
    make_scan(scan, ntime=64, nchan=32, nprod=1)
    plan = tmp_path / "q.json"
    sets = ["--set", "chunk_dumps=32"]
    assert cli.main(["plan", str(scan), "--out", str(plan), *sets]) == 0
    parts = []
    for det in ("sk", "sumthreshold"):
        parts.append(str(tmp_path / f"q.{det}.h5"))
        assert cli.main(["detect", str(scan), "--detector", det, "--plan", str(plan), "--out", parts[-1],
                         "--workers", "1", "--scheduler", "synchronous", *sets]) == 0
    out = tmp_path / "flags" / "q.h5"
    assert cli.main(["merge", str(scan), "--partial", *parts, "--out", str(out), *sets]) == 0
    with h5py.File(out, "r") as f:
        assert f["flags"].dtype == np.uint8 and f["flags"].shape == (64, 32, 1)
        assert f.attrs["band_config_path"].endswith("L.yaml")


def test_inspect_a_demo_simulator_scan(tmp_path, capsys):
    from rfisieve.sim.scans import simulate_scan

    path = tmp_path / "qro_test_P.h5"
    simulate_scan(path, band="P", ntime=32, nchan=16, cross=True, with_s2=False, seed=1)
    assert cli.main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    assert "P" in out and "complex64" in out and "cross products" in out and "MHz" in out


@pytest.mark.parametrize("profile", ["local", "cluster"])
def test_profiles_use_real_snakemake_options(profile):
    # A profile's keys are Snakemake command-line options without the leading "--".
    import yaml
    from snakemake.cli import get_argument_parser

    options = {o for a in get_argument_parser()._actions for o in a.option_strings}
    keys = yaml.safe_load((ROOT / "workflow" / "profiles" / profile / "config.yaml").read_text())
    assert keys and all(f"--{k}" in options for k in keys), keys


def test_run_strict_stops_early_on_a_band_without_config(tmp_path):
    path = tmp_path / "a.h5"
    make_scan(path, ntime=10, nchan=8, nprod=1, band="Ku")
    _one_line_error(_rfisieve("run", "--strict", "--inputs", str(path), "--dry-run"), "'Ku'", "C, L, P")


def test_run_strict_stops_early_on_a_corrupt_scan(tmp_path):
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"\0" * 4096)
    _one_line_error(_rfisieve("run", "--strict", "--inputs", str(junk), "--dry-run"), str(junk))
