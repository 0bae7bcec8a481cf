"""Run, band and emitter configs: read the YAML files, merge them with the defaults, validate.

The JSON schemas ship once, in ``rfisieve/data`` (:func:`schema_path`); the Snakefile's
``validate`` reads the same files.  YAML is read with :class:`UniqueKeyLoader`, which
refuses a key given twice in one mapping (plain YAML loaders keep the last one silently).
Every problem becomes one :class:`~rfisieve.errors.ConfigError` line naming the file
(or ``--set`` for command-line overrides), the key and what is allowed.
"""

import copy
import glob
import os
import re
from pathlib import Path

import yaml

from rfisieve.config import defaults as settings
from rfisieve.errors import ConfigError

from rfisieve.config.defaults import SCHEMA_NAMES, schema_path  # noqa: F401 (public here too)


def repo_root():
    """The repository root holding the ``Snakefile``, or None for an installed package."""
    root = Path(__file__).resolve().parents[3]
    return root if (root / "Snakefile").is_file() else None


class UniqueKeyLoader(settings.SAFE_LOADER):
    """A YAML SafeLoader that refuses a key given twice in one mapping.

    Plain ``yaml.safe_load`` keeps the last of two equal keys without a word, so a
    band file with ``rho: 1.5`` and, further down, ``rho: 2.0`` would run with 2.0.
    Merge keys (``<<: *anchor``) may still be overridden, as YAML intends.  Built on
    libyaml's parser where PyYAML has it (:data:`rfisieve.config.defaults.SAFE_LOADER`).
    """

    def construct_mapping(self, node, deep=False):
        if isinstance(node, yaml.MappingNode):
            seen = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    first = seen.get(key)
                except TypeError:  # an unhashable key: SafeLoader reports it below
                    continue
                if first is not None:
                    raise yaml.constructor.ConstructorError(
                        None, None,
                        f"duplicate key {key!r} (first given at line {first.line + 1})",
                        key_node.start_mark)
                seen[key] = key_node.start_mark
        return super().construct_mapping(node, deep=deep)


def parse_yaml(text):
    """``yaml.safe_load`` that refuses duplicate keys (:class:`UniqueKeyLoader`)."""
    return yaml.load(text, Loader=UniqueKeyLoader)  # noqa: S506 - a SafeLoader subclass


def read_yaml(path):
    """Parse a YAML file into a mapping; return ``(data, text)``.

    A missing, unreadable, unparsable or non-mapping file, or one that gives a key twice,
    is a one-line ConfigError naming the file (and the line).
    """
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as err:
        raise ConfigError(path, f"cannot read config file ({err.strerror})") from None
    except UnicodeDecodeError:
        raise ConfigError(path, "cannot read config file (not UTF-8 text)") from None
    try:
        data = parse_yaml(text)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark is not None else ""
        problem = getattr(err, "problem", None) or "invalid YAML"
        if problem.startswith("duplicate key"):
            raise ConfigError(path, f"{problem.replace(' (', f'{where} (', 1)}: a key may be given once") from None
        raise ConfigError(path, f"not valid YAML{where}: {problem}") from None
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(path, "expected a mapping of key: value at the top level")
    return data, text


_read_yaml = read_yaml


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
    if v == "pattern" and key == "outdir":
        return f"outdir = {err.instance!r}: may not contain braces {{ or }} (Snakemake wildcards)"
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

    validator = jsonschema.Draft202012Validator(settings.schema(schema_name))
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
        if not all(parts := key.split(".")):
            raise ConfigError("--set", f"{item!r}: empty key part in {key!r}")
        node = out
        for part in parts[:-1]:
            node = node.setdefault(part, {})
            if not isinstance(node, dict):
                raise ConfigError("--set", f"{item!r}: {part!r} was given a value above")
        node[parts[-1]] = parsed
    return out


def check_config_files(paths):
    """Read each run config file with :func:`read_yaml` and validate it alone.

    The Snakefile calls this for ``workflow.configfiles``: Snakemake's own YAML reader
    keeps the last of two equal keys silently; here that is a one-line ConfigError.
    """
    for path in paths or ():
        data, _ = read_yaml(path)
        validate(data, "config.schema.yaml", str(path))


def run_config_from_mapping(data, source="run config"):
    """Full run settings from an already-loaded mapping (used by the Snakefile)."""
    data = dict(data or {})
    validate(data, "config.schema.yaml", source)
    return settings.run_settings(data)


def load_run_config(path=None, overrides=None, overrides_source="--set"):
    """Full run settings: defaults, updated with the YAML file ``path``, then ``overrides``.

    Parameters
    ----------
    path : str or Path, optional
        A run config YAML file (for example ``config/config.yaml``).
    overrides : dict, optional
        Values that win over the file (for example from ``--set`` or ``--inputs``).
    overrides_source : str
        What the overrides are called in an error message (default ``--set``).

    Raises
    ------
    ConfigError
        One line naming the file (or ``overrides_source`` when the file alone is valid
        and an override is not), the key and what is allowed.
    """
    data = {}
    source = "run config"
    if path is not None:
        data, _ = read_yaml(path)
        source = str(path)
        validate(data, "config.schema.yaml", source)
    if overrides:
        source = overrides_source
    merged = settings.merge(data, overrides or {})
    return run_config_from_mapping(merged, source)


def scan_name(path):
    """The scan's name: its file name without ``.h5`` (docs/design.md 3.2 ``<scan>``)."""
    name = Path(path).name
    for suffix in (".h5", ".hdf5"):
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return name


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
    seen = {}
    unique = []
    for p in paths:
        name = scan_name(p)
        if "{" in name or "}" in name:
            raise ConfigError(p, "a scan name may not contain braces { or } (the workflow reads them "
                                 "as wildcards); rename the file")
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
    data, text = read_yaml(path)
    validate(data, "band.schema.yaml", path)
    if band is not None and data["band"] != band:
        raise ConfigError(path, f"band = {data['band']!r} but this file is for band {band!r}")
    for key in ("known_bad", "protect", "emitters"):
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


def load_emitter_list(path):
    """Read and validate an emitter list file (``config/emitters.yaml``); return its mapping."""
    data, _ = read_yaml(path)
    validate(data, "emitters.schema.yaml", path)
    for i, entry in enumerate(data["emitters"]):
        if entry["start_mhz"] > entry["stop_mhz"]:
            raise ConfigError(path, f"emitters[{i}] ({entry['name']}): start_mhz ({entry['start_mhz']}) "
                                    f"must not be above stop_mhz ({entry['stop_mhz']})")
    return data


def set_yaml_values(text, values):
    """Change ``section: {key: value}`` entries in YAML ``text``, keeping every comment.

    ``values`` maps ``(section, key)`` to the new value.  A line ``  key: old  # comment``
    under the top-level ``section:`` becomes ``  key: new  # comment`` (the comment kept
    in its column where the new value fits); a key the section lacks is added as its
    first line, a section the text lacks is appended.  Used by ``rfisieve tune`` so that
    a suggested band config keeps the unit comments of the file it came from.
    """
    lines = text.splitlines()
    for (section, key), value in values.items():
        new = yaml.safe_dump(value, default_flow_style=True).strip().removesuffix("...").strip()
        head = next((i for i, ln in enumerate(lines) if re.match(rf"^{re.escape(section)}\s*:", ln)), None)
        if head is None:
            lines += ["", f"{section}:", f"  {key}: {new}"]
            continue
        end = next((i for i in range(head + 1, len(lines)) if re.match(r"^\S", lines[i])
                    and not lines[i].lstrip().startswith("#")), len(lines))
        pattern = re.compile(rf"^(\s+){re.escape(key)}(\s*:\s*)([^#]*?)(\s*)(#.*)?$")
        for i in range(head + 1, end):
            m = pattern.match(lines[i])
            if m:
                indent, colon, old, gap, comment = m.groups()
                if comment:
                    pad = max(1, len(old) + len(gap) - len(new))
                    lines[i] = f"{indent}{key}{colon}{new}{' ' * pad}{comment}"
                else:
                    lines[i] = f"{indent}{key}{colon}{new}"
                break
        else:
            lines.insert(head + 1, f"  {key}: {new}")
    return "\n".join(lines) + "\n"
