"""Reading scan files (docs/design.md 3.1) and writing outputs safely.

Scans are opened read-only and validated against the layout table; every problem is
raised as :class:`~rfisieve.errors.ScanError` with a one-line message naming the file.
Users whose files use other dataset names or axis orders describe them in the run
config's ``layout`` (see :data:`rfisieve.config.defaults.RUN_DEFAULTS`); nothing beyond that
table is assumed.

Checks beyond the shapes: ``/time`` strictly increasing (the first bad dump is
named); a step of more than :data:`GAP_FACTOR` integration times is a gap, and the
scan's contiguous stretches (:attr:`Scan.segments`) are flagged each on its own;
``/flags`` boolean or integer; product names strings ``<inputA>-<inputB>``, each
once; an ``/s2`` that holds no finite value is ignored with a warning (spectral
kurtosis then runs over blocks of dumps), rather than making every sample invalid.

Outputs are written to a temporary name in the destination directory and renamed
when complete (:func:`atomic_output`), so an interrupted run never leaves a file that
looks finished.  Their temporary names match :data:`PARTIAL_GLOBS`, so that leftovers
of a killed run can be found and removed (:func:`remove_partials`).  Those three live in
:mod:`rfisieve.io.atomic` (no h5py) and are re-exported here.
"""

import hashlib
import os
import re
import sys
from pathlib import Path

import h5py
import numpy as np

from rfisieve.config.load import scan_name  # noqa: F401  (re-exported: io.scan.scan_name)
from rfisieve.io.atomic import PARTIAL_GLOBS, atomic_output, remove_partials  # noqa: F401  (re-exported)
from rfisieve.errors import ScanError
from rfisieve.io.hdf5 import attr_str as _attr_str
from rfisieve.textfmt import utc_iso as _utc
from rfisieve.config.defaults import RUN_DEFAULTS

AXES = ("time", "freq", "product")

#: A step in ``/time`` longer than this many integration times is a gap: detection
#: does not run across it (common practice: a dump is late by less than half its length).
GAP_FACTOR = 1.5

#: The documented form of a product name (docs/design.md 3.1): ``<inputA>-<inputB>``.
PRODUCT_NAME = re.compile(r"^[^\s-]+-[^\s-]+$")


_WARNED = set()


def warn(path, message):
    """One warning line on stderr (once per file and message in a process)."""
    if (str(path), message) not in _WARNED:
        _WARNED.add((str(path), message))
        print(f"rfisieve: warning: {path}: {message}", file=sys.stderr, flush=True)






def _layout(layout):
    out = dict(RUN_DEFAULTS["layout"])
    out.update(layout or {})
    return out


def _open_readonly(path):
    path = Path(path)
    if not path.exists():
        raise ScanError(path, "no such file")
    if path.is_dir():
        raise ScanError(path, "is a directory, not a scan file")
    try:
        with open(path, "rb"):
            pass
        is_hdf5 = h5py.is_hdf5(path)
    except PermissionError:
        raise ScanError(path, "cannot be read (permission denied)") from None
    except OSError as err:
        raise ScanError(path, f"cannot be read ({err.strerror or _short(err)})") from None
    if not is_hdf5:
        raise ScanError(path, "not an HDF5 file (truncated, or another format)")
    try:
        return h5py.File(path, "r")
    except OSError as err:
        raise ScanError(path, f"cannot be opened as HDF5 ({_short(err)}); is it truncated?") from None


def _short(err):
    text = " ".join(str(err).split())
    return text[:160]




def scan_band(path, layout=None):
    """Return the ``band`` root attribute of a scan file (raises ScanError)."""
    with _open_readonly(path) as f:
        if "band" not in f.attrs:
            raise ScanError(path, "root attribute 'band' is missing (it selects config/bands/<band>.yaml)")
        return _attr_str(f.attrs["band"]).strip()


def file_identity(path, head_bytes=1 << 20):
    """Identity of an input file: resolved path, size, mtime and sha256 of its first MiB."""
    path = Path(path)
    st = path.stat()
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        h.update(fh.read(head_bytes))
    return {
        "path": str(path.resolve()),
        "size": int(st.st_size),
        "mtime": float(st.st_mtime),
        "sha256_head": h.hexdigest(),
    }


class Scan:
    """A scan file opened read-only, validated against docs/design.md 3.1.

    Use as a context manager (``with open_scan(path) as scan: ...``).  :meth:`read`
    returns arrays in ``(time, chan, prod)`` order whatever the file's axis order.
    """

    def __init__(self, path, layout=None):
        self.path = Path(path)
        self.layout = _layout(layout)
        self._f = _open_readonly(self.path)
        try:
            self._validate()
        except ScanError:
            self._f.close()
            raise
        except (OSError, KeyError, ValueError, TypeError) as err:
            self._f.close()
            raise ScanError(self.path, f"unreadable ({_short(err)})") from None

    # -- validation -------------------------------------------------------------
    def _dataset(self, key, required=True):
        name = self.layout.get(key)
        if not name:
            if required:
                raise ScanError(self.path, f"run config layout gives no dataset name for '{key}'")
            return None
        if name not in self._f:
            if required:
                raise ScanError(self.path, f"dataset {name} is missing")
            return None
        obj = self._f[name]
        if not isinstance(obj, h5py.Dataset):
            raise ScanError(self.path, f"{name} is a group, expected a dataset")
        return obj

    def _validate(self):
        f, path = self._f, self.path
        axes = list(self.layout.get("axes") or AXES)
        if sorted(axes) not in (sorted(AXES), sorted(AXES[:2])):
            raise ScanError(path, f"layout axes {axes} must name time, freq and product once each")
        self._axes = axes
        data = self._dataset("data")
        if data.ndim != len(axes):
            raise ScanError(path, f"{data.name} has {data.ndim} dimensions, layout axes {axes} expect {len(axes)}")
        if data.dtype.kind not in "fc":
            raise ScanError(path, f"{data.name} has dtype {data.dtype}, expected float32 or complex64")
        self._data = data
        shape = dict(zip(axes, data.shape))
        self.ntime = int(shape["time"])
        self.nchan = int(shape["freq"])
        self.nprod = int(shape.get("product", 1))
        self.is_complex = data.dtype.kind == "c"
        self.dtype = data.dtype
        if self.ntime < 1 or self.nchan < 1 or self.nprod < 1:
            raise ScanError(path, f"{data.name} is empty (shape {data.shape})")

        self.time = self._vector("time", self.ntime)
        self.freq = self._vector("freq", self.nchan)
        if not np.all(np.isfinite(self.time)):
            raise ScanError(path, f"{self.layout['time']} holds NaN or Inf")
        if not np.all(np.isfinite(self.freq)):
            raise ScanError(path, f"{self.layout['freq']} holds NaN or Inf")
        prod = self._dataset("products", required=len(axes) == 3)
        if prod is None:
            self.products = ["p0-p0"]
        else:
            if prod.shape != (self.nprod,):
                raise ScanError(path, f"{prod.name} has shape {prod.shape}, expected ({self.nprod},)")
            self.products = self._product_names(prod)
        self.autos = np.array([_is_auto(p) for p in self.products], dtype=bool)

        self._flags = self._dataset("flags", required=False)
        self._s2 = self._dataset("s2", required=False)
        for ds in (self._flags, self._s2):
            if ds is not None and ds.shape != data.shape:
                raise ScanError(path, f"{ds.name} has shape {ds.shape}, expected {data.shape} like {data.name}")
        if self._flags is not None and self._flags.dtype.kind not in "biu":
            raise ScanError(path, f"{self._flags.name} has dtype {self._flags.dtype}; upstream flags must be "
                                  "boolean or integer (nonzero = flagged)")
        if self._s2 is not None and self._s2.dtype.kind not in "fiu":
            raise ScanError(path, f"{self._s2.name} has dtype {self._s2.dtype}, expected float32")
        self.has_flags = self._flags is not None
        self.warnings = []
        if self._s2 is not None and not self._any_finite(self._s2):
            self._note(f"{self._s2.name} holds no finite value; it is ignored and spectral kurtosis "
                       "runs over blocks of dumps instead of per dump")
            self._s2 = None
        self.has_s2 = self._s2 is not None

        attrs = {k: f.attrs[k] for k in f.attrs}
        self.attrs = attrs
        if "band" not in attrs:
            raise ScanError(path, "root attribute 'band' is missing (it selects config/bands/<band>.yaml)")
        self.band = _attr_str(attrs["band"]).strip()
        self.integration_time = self._number("integration_time", positive=True)
        self.channel_width = self._number("channel_width", positive=False)
        acc = self._number("accumulations", positive=True)
        if acc != int(acc) or acc < 1:
            raise ScanError(path, f"root attribute accumulations = {acc}, expected a whole number >= 1")
        self.accumulations = int(acc)
        presum = self._number("presum", positive=True, default=1)
        if presum != int(presum):
            raise ScanError(path, f"root attribute presum = {presum}, expected a whole number >= 1")
        self.presum = int(presum)
        voltage = _attr_str(attrs.get("voltage", "complex")).strip().lower()
        if voltage not in ("complex", "real"):
            raise ScanError(path, f"root attribute voltage = {voltage!r}, expected 'complex' or 'real'")
        self.voltage = voltage
        self.d = 1.0 if voltage == "complex" else 0.5
        self._check_time()

    def _note(self, message):
        self.warnings.append(message)
        warn(self.path, message)

    def _product_names(self, prod):
        """Product names as str, each of the form ``<inputA>-<inputB>`` and given once."""
        if prod.dtype.kind not in "OSU":
            raise ScanError(self.path, f"{prod.name} has dtype {prod.dtype}; product names must be strings "
                                       "'<inputA>-<inputB>'")
        names = []
        for i, raw in enumerate(prod[()]):
            if not isinstance(raw, (bytes, str, np.bytes_, np.str_)):
                raise ScanError(self.path, f"{prod.name}[{i}] = {raw!r} is not a string '<inputA>-<inputB>'")
            name = _attr_str(raw)
            if not PRODUCT_NAME.match(name):
                raise ScanError(self.path, f"{prod.name}[{i}] = {name!r} is not of the form '<inputA>-<inputB>' "
                                           "(two input names without '-' or spaces, joined by '-')")
            if name in names:
                raise ScanError(self.path, f"{prod.name}[{i}] = {name!r} repeats {prod.name}[{names.index(name)}]")
            names.append(name)
        return names

    def _any_finite(self, ds):
        """Whether ``ds`` holds a finite value (stops at the first one: cheap when it does)."""
        step = max(1, (1 << 20) // max(1, self.nchan * self.nprod))
        for start in range(0, self.ntime, step):
            if np.isfinite(self._read(ds, start, start + step)).any():
                return True
        return False

    def _check_time(self):
        """``/time`` strictly increasing; steps above GAP_FACTOR dumps split the scan."""
        name, t = self.layout["time"], self.time
        step = np.diff(t)
        bad = np.flatnonzero(~(step > 0))
        if bad.size:
            i = int(bad[0]) + 1
            how = (f"repeats at dump {i} ({_utc(t[i])}, the time of dump {i - 1})" if step[i - 1] == 0 else
                   f"goes back in time at dump {i} ({_utc(t[i])}, {t[i] - t[i - 1]:+g} s after dump {i - 1})")
            raise ScanError(self.path, f"{name} {how}; dumps must be in time order, each once")
        limit = GAP_FACTOR * self.integration_time
        after = np.flatnonzero(step > limit)
        #: gaps as (index of the dump before the gap, length of the step in s)
        self.gaps = [(int(i), float(step[i])) for i in after]
        edges = [0] + [int(i) + 1 for i in after] + [self.ntime]
        #: contiguous stretches [start, stop) of dumps, flagged each on its own
        self.segments = [[a, b] for a, b in zip(edges[:-1], edges[1:])]
        if self.gaps:
            self._note(f"{name} has {len(self.gaps)} gap(s) longer than {GAP_FACTOR:g} integration times "
                       f"(first {self.gaps[0][1]:g} s after dump {self.gaps[0][0]}); the {len(self.segments)} "
                       "stretches are flagged each on its own")

    def _vector(self, key, n):
        ds = self._dataset(key)
        if ds.shape != (n,):
            raise ScanError(self.path, f"{ds.name} has shape {ds.shape}, expected ({n},) to match {self._data.name}")
        return np.asarray(ds[()], dtype=np.float64)

    def _number(self, key, positive, default=None):
        if key not in self.attrs:
            if default is not None:
                return default
            raise ScanError(self.path, f"root attribute '{key}' is missing")
        try:
            value = float(np.asarray(self.attrs[key]).reshape(-1)[0])
        except (TypeError, ValueError, IndexError):
            raise ScanError(self.path, f"root attribute {key} = {self.attrs[key]!r} is not a number") from None
        if not np.isfinite(value) or (positive and value <= 0) or value == 0:
            raise ScanError(self.path, f"root attribute {key} = {value} must be a finite number > 0")
        return value

    # -- reading ----------------------------------------------------------------
    @property
    def name(self):
        return scan_name(self.path)

    @property
    def shape(self):
        return (self.ntime, self.nchan, self.nprod)

    @property
    def first_auto(self):
        """Index of the first auto product (0 when there is none): the product of the
        review's data image."""
        return int(np.flatnonzero(self.autos)[0]) if self.autos.any() else 0

    def _read(self, ds, start, stop, prod=None):
        def axis_sel(ax):
            if ax == "time":
                return slice(start, stop)
            if ax == "product" and prod is not None:
                return slice(prod, prod + 1)
            return slice(None)

        sel = tuple(axis_sel(ax) for ax in self._axes)
        try:
            block = ds[sel]
        except (OSError, ValueError, RuntimeError) as err:
            raise ScanError(
                self.path, f"cannot read dumps {start}-{stop} of {ds.name} ({_short(err)}); truncated or corrupt file?"
            ) from None
        if len(self._axes) == 2:
            block = block[..., np.newaxis]
            order = [self._axes.index("time"), self._axes.index("freq"), 2]
        else:
            order = [self._axes.index(ax) for ax in AXES]
        if order != [0, 1, 2]:
            block = np.transpose(block, order)
        return block

    def read(self, start, stop, what=("data", "flags", "s2"), prod=None):
        """Read dumps ``start:stop``: a dict of arrays in (time, chan, prod) order.

        Keys are those of ``what`` that the file has: ``data`` (as stored), ``flags``
        (bool) and ``s2`` (float32).  ``prod`` selects one product (the product axis
        is then of length 1).
        """
        start, stop = max(0, int(start)), min(self.ntime, int(stop))
        out = {}
        if "data" in what:
            out["data"] = self._read(self._data, start, stop, prod)
        if "flags" in what and self._flags is not None:
            out["flags"] = self._read(self._flags, start, stop, prod) != 0
        if "s2" in what and self._s2 is not None:
            out["s2"] = self._read(self._s2, start, stop, prod).astype(np.float32, copy=False)
        return out

    def close(self):
        self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def _is_auto(product):
    parts = product.split("-")
    return len(parts) == 2 and parts[0] == parts[1]


def open_scan(path, layout=None):
    """Open a scan file read-only and validate it (raises ScanError)."""
    return Scan(path, layout)
