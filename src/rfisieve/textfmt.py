"""Text for people: UTC times and percentages, one home for the whole package."""

import datetime as _dt
import math


def _finite(t):
    return t is not None and math.isfinite(float(t))


def utc_iso(t):
    """Seconds since 1970 as ISO 8601 UTC to the second, ``2026-12-01T21:05:00Z``."""
    return _dt.datetime.fromtimestamp(float(t), _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def utc_minutes(t, missing="?"):
    """Seconds since 1970 as ``2026-12-01 21:05 UTC`` (``missing`` when None or not finite)."""
    if not _finite(t):
        return missing
    return _dt.datetime.fromtimestamp(float(t), _dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def pct(x, digits=2, missing="n/a", sep="\u00a0"):
    """A fraction as a percentage, ``12.34 %``; number and sign joined by ``sep`` (a
    no-break space by default, so table cells never wrap between them)."""
    if x is None or not math.isfinite(float(x)):
        return missing
    return f"{100 * float(x):.{digits}f}{sep}%"


def count_noun(n, word):
    """``1 scan``, ``2 scans``."""
    return f"{n} {word}{'' if n == 1 else 's'}"
