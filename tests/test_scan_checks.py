"""Scan files that must be refused in one line naming the file (or flagged with a warning),
named after the cases of issue 12: bad /flags, /s2 all NaN, /time out of order, gaps,
bad product names, an unreadable file, braces in a name.  Inputs stay byte-identical."""

import os
import subprocess
import sys

import h5py
import numpy as np
import pytest

from conftest import ROOT, sha256, tool_env
from rfisieve import cli
from rfisieve.errors import ScanError
from rfisieve.io import scan as io
from scanfactory import make_scan


def _rfisieve(*args, cwd=None, **kw):
    return subprocess.run([sys.executable, "-m", "rfisieve.cli", *args], capture_output=True, text=True,
                          env=tool_env(), cwd=cwd or ROOT, timeout=120, **kw)


def _one_line(res, *words):
    assert res.returncode == 2, (res.stdout, res.stderr)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("rfisieve: error: "), res.stderr
    for word in words:
        assert word in lines[0], lines[0]
    return lines[0]


def _scan(tmp_path, name="a.h5", edit=None, **kw):
    path = tmp_path / name
    make_scan(path, **{"ntime": 40, "nchan": 16, "nprod": 2, **kw})
    if edit is not None:
        with h5py.File(path, "a") as f:
            edit(f)
    return path


def _replace(f, name, data):
    del f[name]
    f[name] = data


def _refused(path, *words):
    """`rfisieve inspect` and `rfisieve plan` both refuse in one line; the file is unchanged."""
    before = sha256(path)
    for command in ("inspect", "plan"):
        _one_line(_rfisieve(command, str(path)), str(path), *words)
    assert sha256(path) == before


def test_flags_stored_as_strings_are_refused(tmp_path):
    def edit(f):
        f.create_dataset("flags", data=np.full(f["data"].shape, "0", dtype="S1"))
    _refused(_scan(tmp_path, edit=edit), "/flags", "boolean or integer")


@pytest.mark.parametrize("dtype", [np.bool_, np.uint8, np.int32])
def test_flags_boolean_or_integer_are_read(tmp_path, dtype):
    def edit(f):
        fl = np.zeros(f["data"].shape, dtype=dtype)
        fl[:4] = 1
        f["flags"] = fl
    with io.open_scan(_scan(tmp_path, edit=edit)) as scan:
        assert scan.read(0, 40, ("flags",))["flags"].sum() == 4 * 16 * 2


def test_s2_all_nan_falls_back_to_block_sk_with_a_warning(tmp_path, capfd):
    def edit(f):
        f["s2"][...] = np.nan
    path = _scan(tmp_path, edit=edit, s2=True, accumulations=16)
    before = sha256(path)
    with io.open_scan(path) as scan:
        assert not scan.has_s2 and "no finite value" in scan.warnings[0]
    plan = tmp_path / "a.json"
    sets = ["--set", "chunk_dumps=16"]
    assert cli.main(["plan", str(path), "--out", str(plan), *sets]) == 0
    part = tmp_path / "a.sk.h5"
    assert cli.main(["detect", str(path), "--detector", "sk", "--plan", str(plan), "--out", str(part),
                     "--workers", "1", "--scheduler", "synchronous", *sets]) == 0
    err = capfd.readouterr().err
    assert f"rfisieve: warning: {path}: /s2 holds no finite value" in err
    with h5py.File(part, "r") as f:
        invalid = (f["flags"][()] & 2) != 0  # bit 1: invalid (docs/design.md 3.2)
        assert invalid.mean() < 0.01  # before: every auto sample was invalid
        assert f["diagnostics/sk"].attrs["mode"] == "block"
    assert sha256(path) == before


@pytest.mark.parametrize("case, words", [
    ("descending", ["/time goes back in time at dump 1"]),
    ("duplicated", ["/time repeats at dump 7"]),
    ("one step back", ["/time goes back in time at dump 21", "-3 s after dump 20"]),
])
def test_time_out_of_order_is_refused_naming_the_first_bad_dump(tmp_path, case, words):
    def edit(f):
        t = 1.8e9 + 2.0 * np.arange(40)
        if case == "descending":
            t = t[::-1].copy()
        elif case == "duplicated":
            t[7] = t[6]
        else:
            t[21] = t[20] - 3.0
        _replace(f, "time", t)
    _refused(_scan(tmp_path, edit=edit), *words)


def test_gaps_are_reported(tmp_path, capsys):
    def edit(f):
        t = 1.8e9 + 2.0 * np.arange(40)
        t[25:] += 600.0  # a ten-minute gap after dump 24
        t[10:] += 2.0    # one missing dump: a step of 2 integration times (> 1.5) is a gap too
        _replace(f, "time", t)
    path = _scan(tmp_path, edit=edit)
    with io.open_scan(path) as scan:
        assert scan.gaps == [(9, 4.0), (24, 602.0)]
        assert scan.segments == [[0, 10], [10, 25], [25, 40]]
    assert cli.main(["inspect", "--json", str(path)]) == 0
    import json

    assert json.loads(capsys.readouterr().out)["gaps"] == [{"after_dump": 9, "seconds": 4.0},
                                                          {"after_dump": 24, "seconds": 602.0}]


def test_steady_time_has_one_stretch(tmp_path):
    with io.open_scan(_scan(tmp_path)) as scan:
        assert scan.gaps == [] and scan.segments == [[0, 40]]


@pytest.mark.parametrize("names, words", [
    (np.array([1, 2], dtype=np.int64), ["/products", "must be strings"]),
    (np.array(["pier1.a-pier1.a", "pier1.a-pier1.a"], dtype=object), ["/products[1]", "repeats /products[0]"]),
    (np.array(["pier1.a-pier1.a", "pier2.a"], dtype=object), ["/products[1]", "'pier2.a'", "<inputA>-<inputB>"]),
    (np.array(["pier1.a-pier1.a", "a-b-c"], dtype=object), ["/products[1]", "<inputA>-<inputB>"]),
])
def test_bad_product_names_are_refused(tmp_path, names, words):
    _refused(_scan(tmp_path, edit=lambda f: _replace(f, "products", names)), *words)


def test_fixed_length_byte_product_names_are_read(tmp_path):
    path = _scan(tmp_path, edit=lambda f: _replace(f, "products", np.array([b"x1-x1", b"x1-x2"])))
    with io.open_scan(path) as scan:
        assert scan.products == ["x1-x1", "x1-x2"] and list(scan.autos) == [True, False]


def test_unreadable_file_is_one_line(capsys):
    import tempfile

    folder = tempfile.mkdtemp(prefix="rfisieve-perm-")
    os.chmod(folder, 0o755)
    path = os.path.join(folder, "closed.h5")
    make_scan(path, ntime=8, nchan=8, nprod=1)
    os.chmod(path, 0o000)
    try:
        if os.geteuid() == 0:  # root reads any file: act as an unprivileged user
            os.seteuid(_nobody())
        try:
            with pytest.raises(ScanError, match="permission denied"):
                io.open_scan(path)
            assert cli.main(["inspect", path]) == 2
        finally:
            if os.getuid() == 0:
                os.seteuid(0)
        err = capsys.readouterr().err.strip().splitlines()
        assert err == [f"rfisieve: error: {path}: cannot be read (permission denied)"]
    finally:
        os.chmod(path, 0o644)
        os.remove(path)
        os.rmdir(folder)


def _nobody():
    import pwd

    try:
        return pwd.getpwnam("nobody").pw_uid
    except KeyError:
        pytest.skip("no unprivileged user to run as")


def test_a_directory_is_not_a_scan(tmp_path):
    with pytest.raises(ScanError, match="is a directory"):
        io.open_scan(tmp_path)


def test_brace_in_a_scan_file_name_is_one_line(tmp_path):
    path = _scan(tmp_path, name="night{1}.h5")
    res = _rfisieve("run", "--inputs", str(path), "--outdir", str(tmp_path / "out"), "--dry-run")
    _one_line(res, "night{1}.h5", "braces")
    assert "WildcardError" not in res.stderr
