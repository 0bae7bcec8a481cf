"""The mask-file format (docs/design.md, mask file): creating the file, its attributes
and the kurtosis diagnostic it carries.
"""

import json
import time as _time

import h5py
import numpy as np

from rfisieve import __version__, bits
from rfisieve.detect.masks import bit_attrs
from rfisieve.io.scan import file_identity


#: gzip (deflate) level of /flags: gzip is built into every HDF5 library, so tools outside
#: Python read the mask without a plug-in (LZF needs one).  Level 1 costs least time.
MASK_GZIP_LEVEL = 1


def _create_mask_file(f, scan, chunk_dumps):
    rows = max(1, min(scan.ntime, chunk_dumps, (1 << 20) // max(1, scan.nchan * scan.nprod)))
    f.create_dataset(
        "flags", shape=(scan.ntime, scan.nchan, scan.nprod), dtype=np.uint8,
        chunks=(rows, scan.nchan, scan.nprod), compression="gzip", compression_opts=MASK_GZIP_LEVEL,
        shuffle=False, fillvalue=0,
    )
    f.create_dataset("time", data=scan.time)
    f.create_dataset("freq", data=scan.freq)
    f["time"].attrs["units"] = "s since 1970-01-01T00:00:00 UTC (dump centre)"
    f["freq"].attrs["units"] = "Hz (channel centre)"
    f.create_dataset("products", data=np.array(scan.products, dtype=object), dtype=h5py.string_dtype())
    f.attrs["scan"] = scan.name
    f.attrs["band"] = scan.band
    for key in ("integration_time", "channel_width", "accumulations"):
        f.attrs[key] = getattr(scan, key)
    f.attrs["rfisieve_version"] = __version__
    f.attrs["input_identity"] = json.dumps(file_identity(scan.path))
    f.attrs["created_utc"] = _time.strftime("%Y-%m-%dT%H:%M:%SZ", _time.gmtime())


def _write_sk_diag(f, hist, meta, band, edges):
    sk = meta.get("sk")
    g = f.require_group("diagnostics/sk")
    g.create_dataset("edges", data=edges)
    g.create_dataset("counts", data=hist, compression="gzip", compression_opts=MASK_GZIP_LEVEL)
    if sk:
        lower, upper = sk["lower"], sk["upper"]
        for key in ("m", "n", "d", "pfa", "method", "mode"):
            g.attrs[key] = sk[key]
        g.attrs["lower"], g.attrs["upper"] = float(lower), float(upper)
    g.attrs["enabled"] = bool(sk)


def _write_noise(f, meta):
    if "sigma" in meta:
        f.attrs["noise_sigma"] = np.asarray(meta["sigma"], dtype=np.float64)


def _write_attrs(f, band, band_source):
    for key, value in bit_attrs().items():
        f.attrs[key] = value
    f.attrs["bit_table"] = json.dumps([{"bit": b[0], "value": b[1], "name": b[2], "meaning": b[3]}
                                       for b in bits.BIT_TABLE])
    f.attrs["band_settings"] = json.dumps(band, sort_keys=True)
    if band_source:
        f.attrs["band_config_path"] = str(band_source.get("path", ""))
        f.attrs["band_config_text"] = str(band_source.get("text", ""))


def _copy_sk_diag(parts, f, meta, band, edges):
    for h in parts:
        if "diagnostics/sk" in h:
            h.copy(h["diagnostics/sk"], f.require_group("diagnostics"), name="sk")
            return
    _write_sk_diag(f, np.zeros((len(meta["autos"]), len(edges) - 1), dtype=np.int64), meta, band, edges)
