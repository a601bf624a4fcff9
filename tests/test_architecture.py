"""The package's shape, read from its own source: data flows one way.

Rules (DEVELOPERS.md, "Architecture"):
- no import cycle between groupsrc modules (function-level imports count too);
- ``groupsrc.stats`` imports nothing from ``inputs``, ``outputs`` or ``formats``:
  statistics see arrays and the source-space contract only;
- nibabel is imported only inside ``groupsrc.formats``.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import groupsrc

ROOT = Path(groupsrc.__file__).parent


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path, source: str | None = None, name: str | None = None):
    """(imported module name, line) for every import in the file, relative ones resolved."""
    name = name or _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    text = path.read_text(encoding="utf-8") if source is None else source
    for node in ast.walk(ast.parse(text, filename=str(path))):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            yield mod, node.lineno
            for a in node.names:              # "from . import x" may name a submodule
                yield f"{mod}.{a.name}", node.lineno


MODULES = {_module_name(p): p for p in ROOT.rglob("*.py")}


def _resolve(mod: str):
    """The groupsrc module an import refers to (longest known prefix), or None."""
    parts = mod.split(".")
    while parts:
        cand = ".".join(parts)
        if cand in MODULES:
            return cand
        parts.pop()
    return None


def _graph():
    g = {m: set() for m in MODULES}
    for m, p in MODULES.items():
        for imp, _ in _imports(p):
            if imp.startswith("groupsrc"):
                t = _resolve(imp)
                if t and t != m and not m.startswith(t + ".") and t != "groupsrc":
                    g[m].add(t)
    return g


def _cycles(g):
    """Strongly connected components of more than one module (Tarjan's algorithm)."""
    index, low, stack, on, cycles, counter = {}, {}, [], set(), [], [0]

    def strong(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in g[v]:
            if w not in index:
                strong(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    for v in sorted(g):
        if v not in index:
            strong(v)
    return cycles


def test_there_is_no_import_cycle():
    cycles = _cycles(_graph())
    assert not cycles, f"import cycles: {cycles}"


def test_the_cycle_finder_finds_a_planted_cycle():
    g = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert _cycles(g) == [["a", "b", "c"]]


@pytest.mark.parametrize("forbidden", ["groupsrc.inputs", "groupsrc.outputs", "groupsrc.formats"])
def test_statistics_do_not_reach_into_files(forbidden):
    bad = [f"{m} line {line}: {imp}" for m, p in MODULES.items()
           if m.startswith("groupsrc.stats") for imp, line in _imports(p)
           if imp == forbidden or imp.startswith(forbidden + ".")]
    assert not bad, "groupsrc.stats must not import " + forbidden + ":\n" + "\n".join(bad)


def test_nibabel_only_in_formats():
    bad = [f"{m} line {line}" for m, p in MODULES.items()
           if not m.startswith("groupsrc.formats") for imp, line in _imports(p)
           if imp == "nibabel" or imp.startswith("nibabel.")]
    assert not bad, "nibabel imported outside groupsrc.formats:\n" + "\n".join(bad)


def test_the_rules_can_fail():
    """The import reader sees a planted violation (so a passing run means something)."""
    planted = "import nibabel\nfrom ..outputs import layout\n\ndef f():\n    from .. import inputs\n"
    names = {n for n, _ in _imports(ROOT / "stats" / "planted.py", planted,
                                    "groupsrc.stats.planted")}
    assert {"nibabel", "groupsrc.outputs.layout", "groupsrc.inputs"} <= names
