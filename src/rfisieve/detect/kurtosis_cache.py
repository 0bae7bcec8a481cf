"""The on-disk cache of spectral-kurtosis thresholds (a small JSON file in the user's
cache directory), in front of :func:`rfisieve.detect.kurtosis_thresholds._compute_thresholds`.
"""

import json
import os
import tempfile
from functools import lru_cache

from rfisieve.detect.kurtosis_thresholds import _compute_thresholds


def _disk_cache_path():
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "rfisieve", f"sk_thresholds-{_CACHE_VERSION}.json")


#: Bump when a threshold method changes, so stale cached values are not reused.
_CACHE_VERSION = 1


@lru_cache(maxsize=4096)
def _thresholds_cached(m, k, pfa, method):
    """Thresholds, cached in memory and in a small JSON file in the user's cache.

    The exact tails cost up to a few seconds per (M, N d, pfa); every flagging job is
    a new process, so the values are also kept on disk.  A cache that cannot be read
    or written is ignored.
    """
    key = f"{method}|{int(m)}|{float(k)!r}|{float(pfa)!r}"
    path = _disk_cache_path()
    try:
        with open(path) as fh:
            hit = json.load(fh).get(key)
        if hit is not None:
            return float(hit[0]), float(hit[1])
    except (OSError, ValueError, AttributeError, TypeError, IndexError):
        pass
    value = _compute_thresholds(m, k, pfa, method)
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        try:
            with open(path) as fh:
                table = json.load(fh)
        except (OSError, ValueError):
            table = {}
        if not isinstance(table, dict):
            table = {}
        table[key] = [value[0], value[1]]
        fd, tmp = tempfile.mkstemp(dir=os.path.dirname(path), prefix=".sk_thresholds.")
        with os.fdopen(fd, "w") as fh:
            json.dump(table, fh)
        os.replace(tmp, path)
    except OSError:
        pass
    return value
