"""Small HDF5 helpers shared by the readers: string datasets and attributes as str."""

import numpy as np


def strings(ds):
    """A string dataset's values as a list of str."""
    return [x.decode() if isinstance(x, bytes) else str(x) for x in ds[()]]


def attr_str(value):
    """An HDF5 attribute (bytes, str or 0-d array) as str."""
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.shape == ():
        return attr_str(value[()])
    return str(value)
