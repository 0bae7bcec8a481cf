"""The layer order of docs/design.md section 2: each layer imports only the layers below it.

Every import in the package (module level and inside functions) is read with ``ast``;
a module may import its own layer and the layers listed before it, never one after it.
"""

import ast
from pathlib import Path

PKG = Path(__file__).resolve().parents[1] / "src" / "rfisieve"

#: Layer rank of each top-level part of the package (docs/design.md, section 2).
RANK = {
    "errors": 0, "bits": 0, "textfmt": 0, "commands": 0, "__init__": 0,
    "detect": 1, "sk": 1,
    "config": 2,
    "io": 3,
    "engine": 4,
    "sim": 5,
    "evaluate": 6,
    "review": 7,
    "cli": 8, "__main__": 8,
}


def _part(dotted):
    parts = dotted.split(".")
    if parts[0] != "rfisieve":
        return None
    return parts[1] if len(parts) > 1 else "__init__"


def _imports(path):
    """Top-level parts of rfisieve imported by the module at ``path``."""
    tree = ast.parse(path.read_text(), filename=str(path))
    rel = path.relative_to(PKG.parent).with_suffix("")
    here = list(rel.parts)
    if here[-1] == "__init__":
        here = here[:-1]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = here[: len(here) - node.level + (1 if path.name == "__init__.py" else 0)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            names = [mod] if node.module else [f"{mod}.{a.name}" for a in node.names]
        else:
            continue
        for n in names:
            part = _part(n)
            if part is not None:
                found.add(part)
    return found


def _own_part(path):
    rel = path.relative_to(PKG)
    return rel.parts[0] if len(rel.parts) > 1 else rel.stem


def test_every_part_has_a_layer():
    parts = {_own_part(p) for p in PKG.rglob("*.py")}
    assert parts <= set(RANK), f"give these a layer in RANK and docs/design.md: {sorted(parts - set(RANK))}"


def test_no_module_imports_a_layer_above_its_own():
    wrong = []
    for path in sorted(PKG.rglob("*.py")):
        own = _own_part(path)
        for part in _imports(path):
            if RANK[part] > RANK[own]:
                wrong.append(f"{path.relative_to(PKG)} imports rfisieve.{part}")
    assert not wrong, "layer order broken:\n" + "\n".join(wrong)


def test_detectors_know_nothing_of_files_or_schedulers():
    # docs/design.md section 2: detectors are pure functions of arrays
    banned = ("h5py", "dask", "snakemake", "yaml")
    wrong = []
    for path in sorted((PKG / "detect").rglob("*.py")):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            mods = ([a.name for a in node.names] if isinstance(node, ast.Import)
                    else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            wrong += [f"{path.name} imports {m}" for m in mods if m.split(".")[0] in banned]
    assert not wrong, wrong
