"""Band and run settings: the defaults every config starts from, and how they are merged.

The defaults have one home: the ``default`` of each key in the packaged JSON schemas
(``rfisieve/data/band.schema.yaml`` and ``config.schema.yaml``), which Snakemake's
``validate`` fills in for the workflow and :data:`BAND_DEFAULTS` / :data:`RUN_DEFAULTS`
are read from here.  A band config (``config/bands/<band>.yaml``) holds only what differs
from these defaults; :func:`band_settings` returns the full, merged dictionary that the
engine and the detectors' callers use.  A new key takes one edit: its schema entry with
a ``default`` (and a line in the shipped files if users should see it).
"""

import copy
from pathlib import Path

import yaml

#: The packaged schemas (the only copies; the Snakefile validates against them too).
DATA_DIR = Path(__file__).resolve().parents[1] / "data"
SCHEMA_NAMES = ("config.schema.yaml", "band.schema.yaml", "emitters.schema.yaml")

#: PyYAML's safe loader on libyaml's C parser when PyYAML was built with it (the same
#: documents, parsed about 9 times faster: 5 ms against 40 ms for the shipped schemas and
#: configs, measured 2026-12-03; every job process reads them), else the pure-Python one.
SAFE_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)

_SCHEMAS = {}


def schema_path(name):
    """Path of the packaged schema ``name`` (e.g. ``"band.schema.yaml"``)."""
    return DATA_DIR / name


def schema(name):
    """The parsed schema ``name`` (read once per process; do not modify it)."""
    if name not in _SCHEMAS:
        with open(schema_path(name), encoding="utf-8") as fh:
            _SCHEMAS[name] = yaml.load(fh, Loader=SAFE_LOADER)  # noqa: S506 - a safe loader
    return _SCHEMAS[name]


def schema_defaults(node):
    """The defaults of a schema object: ``default`` of each property, objects recursed.

    An object property with ``properties`` gives the dict of its own properties'
    defaults (so nested sections are complete); other properties give their ``default``;
    a property without one is left out.
    """
    out = {}
    for key, sub in node.get("properties", {}).items():
        if sub.get("type") == "object" and "properties" in sub:
            out[key] = schema_defaults(sub)
        elif "default" in sub:
            out[key] = copy.deepcopy(sub["default"])
    return out


#: Defaults for every band (from band.schema.yaml; units in its descriptions).
BAND_DEFAULTS = schema_defaults(schema("band.schema.yaml"))

#: Defaults of the run config (from config.schema.yaml); the top-level key names
#: inputs, outdir, chunk_dumps and workers are a contract (docs/design.md 3.4).
RUN_DEFAULTS = schema_defaults(schema("config.schema.yaml"))


def merge(defaults, override):
    """Return ``defaults`` updated recursively with ``override`` (neither is changed)."""
    out = copy.deepcopy(defaults)
    for key, value in (override or {}).items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def band_settings(override=None):
    """Full band settings: :data:`BAND_DEFAULTS` updated with a band config's values."""
    return merge(BAND_DEFAULTS, override)


def run_settings(override=None):
    """Full run settings: :data:`RUN_DEFAULTS` updated with a run config's values."""
    return merge(RUN_DEFAULTS, override)
