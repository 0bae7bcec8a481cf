"""Run and band configs: read the YAML files, merge them with the defaults, validate.

The JSON schemas live in ``workflow/schemas`` (where Snakemake's ``validate`` reads
them) and, identically, in ``rfisieve/data`` (so an installed package finds them too).
Every problem becomes one :class:`~rfisieve.errors.ConfigError` line naming the file,
the key and what is allowed.
"""

import copy
import glob
import os
from pathlib import Path

import yaml

from rfisieve.config import defaults as settings
from rfisieve.errors import ConfigError

SCHEMA_NAMES = ("config.schema.yaml", "band.schema.yaml")


def repo_root():
    """The repository root holding the ``Snakefile``, or None for an installed package."""
    root = Path(__file__).resolve().parents[3]
    return root if (root / "Snakefile").is_file() else None


def schema_path(name):
    """Path of schema ``name``: the repository copy if there is one, else the packaged one."""
    repo_copy = Path(__file__).resolve().parents[3] / "workflow" / "schemas" / name
    if repo_copy.is_file():
        return repo_copy
    return Path(__file__).resolve().parents[1] / "data" / name


_SCHEMAS = {}


def _schema(name):
    if name not in _SCHEMAS:
        with open(schema_path(name), encoding="utf-8") as fh:
            _SCHEMAS[name] = yaml.safe_load(fh)
    return _SCHEMAS[name]


def _read_yaml(path):
    """Parse a YAML mapping; a missing, unparsable or non-mapping file is a ConfigError."""
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as err:
        raise ConfigError(path, f"cannot read config file ({err.strerror})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark is not None else ""
        problem = getattr(err, "problem", None) or "invalid YAML"
        raise ConfigError(path, f"not valid YAML{where}: {problem}") from None
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(path, "expected a mapping of key: value at the top level")
    return data, text


def _key(path_items):
    out = ""
    for item in path_items:
        out += f"[{item}]" if isinstance(item, int) else (f".{item}" if out else str(item))
    return out or "(top level)"


def _describe(err):
    """One-line text for a jsonschema error: the key and what is allowed."""
    key = _key(err.absolute_path)
    sch = err.schema if isinstance(err.schema, dict) else {}
    v = err.validator
    if v == "additionalProperties":
        allowed = ", ".join(sorted(sch.get("properties", {})))
        extra = sorted(set(err.instance) - set(sch.get("properties", {})))
        where = "" if key == "(top level)" else f" in {key}"
        return f"unknown key {', '.join(map(repr, extra))}{where}; allowed keys: {allowed}"
    if v == "required":
        return f"{key}: {err.message}"
    if v == "enum":
        return f"{key} = {err.instance!r}: must be one of {', '.join(map(repr, err.validator_value))}"
    if v == "pattern" and key == "scheduler":
        return (f"scheduler = {err.instance!r}: must be threads, processes, synchronous "
                "or a dask.distributed address tcp://host:port")
    if v in ("oneOf", "anyOf"):
        return f"{key} = {err.instance!r}: must be {sch.get('description', 'of another type')}"
    bounds = {"minimum": ">=", "maximum": "<=", "exclusiveMinimum": ">", "exclusiveMaximum": "<"}
    if v in bounds:
        return f"{key} = {err.instance!r}: must be {bounds[v]} {err.validator_value}"
    if v == "type":
        want = err.validator_value
        want = " or ".join(want) if isinstance(want, list) else want
        return f"{key} = {err.instance!r}: must be of type {want}"
    return f"{key}: {err.message}"


def validate(data, schema_name, path):
    """Validate ``data`` against a schema; raise ConfigError(path, ...) on the first problem."""
    import jsonschema

    validator = jsonschema.Draft202012Validator(_schema(schema_name))
    error = jsonschema.exceptions.best_match(validator.iter_errors(data))
    if error is not None:
        raise ConfigError(path, _describe(error))


def parse_set(items):
    """``["a.b=1", "c=x"]`` -> ``{"a": {"b": 1}, "c": "x"}`` (values are YAML)."""
    out = {}
    for item in items or ():
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise ConfigError("--set", f"{item!r}: expected KEY=VALUE")
        try:
            parsed = yaml.safe_load(value) if value else None
        except yaml.YAMLError:
            raise ConfigError("--set", f"{item!r}: the value is not valid YAML") from None
        node = out
        parts = key.split(".")
        for part in parts[:-1]:
            node = node.setdefault(part, {})
        node[parts[-1]] = parsed
    return out


def run_config_from_mapping(data, source="run config"):
    """Full run settings from an already-loaded mapping (used by the Snakefile)."""
    data = dict(data or {})
    validate(data, "config.schema.yaml", source)
    return settings.run_settings(data)


def load_run_config(path=None, overrides=None):
    """Full run settings: defaults, updated with the YAML file ``path``, then ``overrides``.

    Parameters
    ----------
    path : str or Path, optional
        A run config YAML file (for example ``config/config.yaml``).
    overrides : dict, optional
        Values that win over the file (for example from ``--set`` or ``--inputs``).

    Raises
    ------
    ConfigError
        One line naming the file, the key and what is allowed.
    """
    data = {}
    source = "run config"
    if path is not None:
        data, _ = _read_yaml(path)
        source = str(path)
    merged = settings.merge(data, overrides or {})
    return run_config_from_mapping(merged, source)


def expand_inputs(inputs, source="inputs"):
    """Scan paths from a glob or a list of paths/globs, sorted, duplicates removed.

    Raises ConfigError when nothing matches, when a listed file is missing or when two
    scans would share a name (their outputs would collide).
    """
    if isinstance(inputs, (str, os.PathLike)):
        inputs = [inputs]
    paths = []
    for pattern in inputs or ():
        pattern = os.path.expanduser(str(pattern))
        if glob.has_magic(pattern):
            found = sorted(glob.glob(pattern))
            if not found:
                raise ConfigError(source, f"the pattern {pattern!r} matches no file")
            paths.extend(found)
        elif os.path.isfile(pattern):
            paths.append(pattern)
        else:
            raise ConfigError(source, f"no such scan file {pattern!r}")
    if not paths:
        raise ConfigError(source, "no scans given: set inputs to a glob or a list of files")
    from rfisieve.io.scan import scan_name

    seen = {}
    unique = []
    for p in paths:
        name = scan_name(p)
        if name in seen:
            if os.path.abspath(seen[name]) == os.path.abspath(p):
                continue
            raise ConfigError(source, f"two scans named {name!r}: {seen[name]} and {p}")
        if name == "run":
            raise ConfigError(source, f"{p}: a scan may not be named 'run' (reserved for run.csv)")
        seen[name] = p
        unique.append(p)
    return unique


def band_config_path(bands_dir, band):
    """``<bands_dir>/<band>.yaml``."""
    return os.path.join(str(bands_dir), f"{band}.yaml")


def available_bands(bands_dir):
    """Names of the bands that have a config file in ``bands_dir``."""
    return sorted(p.stem for p in Path(bands_dir).glob("*.yaml"))


def load_band_file(path, band=None):
    """Read and validate one band config file; see :func:`load_band`."""
    data, text = _read_yaml(path)
    validate(data, "band.schema.yaml", path)
    if band is not None and data["band"] != band:
        raise ConfigError(path, f"band = {data['band']!r} but this file is for band {band!r}")
    for key in ("known_bad", "emitters"):
        for i, entry in enumerate(data.get(key, [])):
            if entry["start_mhz"] >= entry["stop_mhz"]:
                raise ConfigError(path, f"{key}[{i}]: start_mhz ({entry['start_mhz']}) must be "
                                        f"below stop_mhz ({entry['stop_mhz']})")
    full = settings.band_settings(copy.deepcopy(data))
    return full, {"path": str(path), "text": text}


def load_band(bands_dir, band):
    """Band settings for ``band``: its config file merged with the band defaults.

    Returns
    -------
    (settings, source)
        ``settings`` is the full dict (see :func:`rfisieve.config.defaults.band_settings`);
        ``source`` is ``{"path": ..., "text": ...}`` of the file used.

    Raises
    ------
    ConfigError
        The band has no config (the message lists the bands that have one), or the
        file has an unknown key or a bad value.
    """
    path = band_config_path(bands_dir, band)
    if not os.path.isfile(path):
        have = ", ".join(available_bands(bands_dir)) or "none"
        raise ConfigError(path, f"no config for band {band!r}; bands with a config: {have}")
    return load_band_file(path, band)
