"""Reading scan files (DESIGN.md 2.1) and writing outputs safely.

Scans are opened read-only and validated against the layout table; every problem is
raised as :class:`~rfisieve.errors.ScanError` with a one-line message naming the file.
Users whose files use other dataset names or axis orders describe them in the run
config's ``layout`` (see :data:`rfisieve.config.defaults.RUN_DEFAULTS`); nothing beyond that
table is assumed.

Outputs are written to a temporary name in the destination directory and renamed
when complete (:func:`atomic_output`), so an interrupted run never leaves a file that
looks finished.
"""

import contextlib
import hashlib
import os
import tempfile
from pathlib import Path

import h5py
import numpy as np

from rfisieve.errors import ScanError
from rfisieve.io.hdf5 import attr_str as _attr_str
from rfisieve.config.defaults import RUN_DEFAULTS

AXES = ("time", "freq", "product")


def scan_name(path):
    """The scan's name: its file name without ``.h5`` (DESIGN.md 2.2 ``<scan>``)."""
    name = Path(path).name
    for suffix in (".h5", ".hdf5"):
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return name


def _layout(layout):
    out = dict(RUN_DEFAULTS["layout"])
    out.update(layout or {})
    return out


def _open_readonly(path):
    path = Path(path)
    if not path.exists():
        raise ScanError(path, "no such file")
    if not h5py.is_hdf5(path):
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
    """A scan file opened read-only, validated against DESIGN.md 2.1.

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
            self.products = [_attr_str(p) for p in prod[()]]
        self.autos = np.array([_is_auto(p) for p in self.products], dtype=bool)

        self._flags = self._dataset("flags", required=False)
        self._s2 = self._dataset("s2", required=False)
        for ds in (self._flags, self._s2):
            if ds is not None and ds.shape != data.shape:
                raise ScanError(path, f"{ds.name} has shape {ds.shape}, expected {data.shape} like {data.name}")
        self.has_flags = self._flags is not None
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


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_output(path, suffix=None):
    """Yield a temporary path beside ``path``; rename it to ``path`` when the block ends.

    On an exception the temporary file is removed and nothing is left at ``path``.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix or ".partial", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; outputs are for everyone
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise
