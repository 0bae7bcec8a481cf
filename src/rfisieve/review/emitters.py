"""Known emitters and protected bands: load the list and match frequency ranges against it.

The shipped list is ``config/emitters.yaml`` (key ``emitters``: entries with ``name``,
``start_mhz``, ``stop_mhz``, ``kind`` = ``emitter`` or ``protected``, ``source``, the
public document the range comes from, or "from memory", and optional ``aliases``, other
names of the same emitter, used to merge duplicates).  A site adds its own
entries per band under the key ``emitters`` of ``config/bands/<band>.yaml``
(``{name, start_mhz, stop_mhz, source}``, kind defaults to ``emitter``); these are
merged in with ``site`` set to the band name.
"""

import os

from rfisieve.errors import ConfigError

KINDS = ("emitter", "protected")


def _check_entry(entry, path, where):
    if not isinstance(entry, dict):
        raise ConfigError(path, f"{where}: an emitter entry must be a mapping, got {type(entry).__name__}")
    for key in ("name", "start_mhz", "stop_mhz"):
        if key not in entry:
            raise ConfigError(path, f"{where}: emitter entry {entry.get('name', '?')!r} lacks '{key}'")
    try:
        start, stop = float(entry["start_mhz"]), float(entry["stop_mhz"])
    except (TypeError, ValueError):
        raise ConfigError(path, f"{where}: emitter {entry['name']!r}: start_mhz/stop_mhz must be numbers") from None
    if not start <= stop:
        raise ConfigError(path, f"{where}: emitter {entry['name']!r}: start_mhz {start} > stop_mhz {stop}")
    kind = entry.get("kind", "emitter")
    if kind not in KINDS:
        raise ConfigError(path, f"{where}: emitter {entry['name']!r}: kind must be one of {KINDS}, got {kind!r}")
    aliases = entry.get("aliases") or []
    if not isinstance(aliases, list) or not all(isinstance(a, str) for a in aliases):
        raise ConfigError(path, f"{where}: emitter {entry['name']!r}: aliases must be a list of names")
    return {"name": str(entry["name"]), "start_mhz": start, "stop_mhz": stop, "kind": kind,
            "source": str(entry.get("source", "not given")), "aliases": list(aliases)}


def parse_emitters(entries, path="<emitters>", site=None):
    """Validate a list of emitter mappings; return normalised dicts (``site`` added)."""
    if entries is None:
        return []
    if not isinstance(entries, list):
        raise ConfigError(path, "'emitters' must be a list of {name, start_mhz, stop_mhz, source}")
    out = []
    for i, e in enumerate(entries):
        row = _check_entry(e, path, f"emitters[{i}]")
        row["site"] = site
        out.append(row)
    return out


def _load_yaml(path):
    import yaml

    from rfisieve.config.load import parse_yaml  # refuses duplicate keys

    try:
        with open(path) as fh:
            return parse_yaml(fh) or {}
    except OSError as err:
        raise ConfigError(path, f"cannot read ({err.strerror})") from None
    except yaml.YAMLError as err:
        raise ConfigError(path, f"not valid YAML ({str(err).splitlines()[0]})") from None


def default_emitters_path():
    """``config/emitters.yaml`` of the repository (or of the current directory)."""
    here = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..", "..", "config", "emitters.yaml"))
    if os.path.isfile(here):
        return here
    return os.path.join("config", "emitters.yaml")


def load_emitters(path=None, bands_dir=None, bands=None):
    """Load the emitter list, merged with the sites' band-config entries.

    Parameters
    ----------
    path : str, optional
        Emitter list (default :func:`default_emitters_path`); ``""`` for none.
    bands_dir : str, optional
        Directory of band configs ``<band>.yaml`` whose ``emitters`` key is merged.
    bands : iterable of str, optional
        Bands whose configs are read (default: every ``*.yaml`` in ``bands_dir``).

    Returns
    -------
    list of dict
        ``name``, ``start_mhz``, ``stop_mhz``, ``kind``, ``source``, ``site`` (band
        name for site entries, else None), sorted by start frequency.
    """
    out = []
    if path is None:
        path = default_emitters_path()
    if path:
        if not os.path.isfile(path):
            raise ConfigError(path, "emitter list not found")
        from rfisieve.config.load import load_emitter_list  # emitters.schema.yaml

        out += parse_emitters(load_emitter_list(path)["emitters"], path)
    if bands_dir and os.path.isdir(bands_dir):
        names = sorted(bands) if bands is not None else sorted(
            f[:-5] for f in os.listdir(bands_dir) if f.endswith(".yaml"))
        for band in names:
            bpath = os.path.join(bands_dir, f"{band}.yaml")
            if not os.path.isfile(bpath):
                continue
            doc = _load_yaml(bpath)
            if isinstance(doc, dict) and doc.get("emitters"):
                out += parse_emitters(doc["emitters"], bpath, site=band)
    out.sort(key=lambda e: (e["start_mhz"], e["stop_mhz"], e["name"]))
    return out


def match_emitters(start_mhz, stop_mhz, emitters):
    """Emitters whose range overlaps the frequency range ``[start_mhz, stop_mhz]``.

    Parameters
    ----------
    start_mhz, stop_mhz : float
        The range to annotate, MHz (e.g. the outer channel edges of an occupied range).
    emitters : list of dict
        Entries with ``start_mhz`` and ``stop_mhz`` (:func:`load_emitters`).

    Returns
    -------
    list of dict
        The overlapping entries, largest overlap (as a fraction of the queried range)
        first; ranges that only touch at an edge do not match.
    """
    lo, hi = min(start_mhz, stop_mhz), max(start_mhz, stop_mhz)
    hits = []
    for e in emitters:
        a, b = max(lo, e["start_mhz"]), min(hi, e["stop_mhz"])
        if b > a or (lo == hi and e["start_mhz"] <= lo <= e["stop_mhz"]):
            hits.append((-(b - a), e["stop_mhz"] - e["start_mhz"], e))
    hits.sort(key=lambda h: (h[0], h[1]))
    return [h[2] for h in hits]


def in_band(emitters, fmin_mhz, fmax_mhz):
    """Emitters overlapping ``[fmin_mhz, fmax_mhz]`` (for marking plots)."""
    return [e for e in emitters if e["stop_mhz"] > fmin_mhz and e["start_mhz"] < fmax_mhz]


def _name_key(name):
    """A name without parenthesised details, case and punctuation: "GLONASS L1 (FDMA)" -> "glonass l1"."""
    import re

    base = re.sub(r"\([^)]*\)", " ", str(name)).lower()
    return " ".join(re.sub(r"[^a-z0-9]+", " ", base).split())


def _cited(e):
    return "from memory" not in e.get("source", "")


def merge_duplicates(emitters):
    """One entry per emitter: entries whose names (or ``aliases``) agree, ignoring case,
    punctuation and parenthesised details, and whose ranges overlap are merged.

    The entry kept is the shipped one (``site`` None) before a band config's, and
    within those the one whose source cites a document rather than memory; its name,
    range and source stand, and ``also`` lists the other entries' ``(where, source)``
    (``where`` = ``config/bands/<band>.yaml`` or ``config/emitters.yaml``).
    """
    def keys(e):
        return {_name_key(n) for n in [e["name"], *e.get("aliases", [])]}

    kept = []
    for e in sorted(emitters, key=lambda e: (e.get("site") is not None, not _cited(e), e["start_mhz"])):
        twin = next((k for k in kept if keys(k) & keys(e) and k["kind"] == e["kind"]
                     and e["start_mhz"] < k["stop_mhz"] and k["start_mhz"] < e["stop_mhz"]), None)
        if twin is None:
            kept.append(dict(e, also=list(e.get("also", []))))
        else:
            twin["also"].append((where_from(e), e["source"]))
    kept.sort(key=lambda e: (e["start_mhz"], e["stop_mhz"], e["name"]))
    return kept


def where_from(e):
    """Which file an entry comes from (for the page's tables)."""
    return f"config/bands/{e['site']}.yaml" if e.get("site") else "config/emitters.yaml"
