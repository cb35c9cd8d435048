"""The package layout: no import cycle in labeler/, and imports that follow the flow one way.

Both checks read the source (every ``import`` statement, at module level or inside a function)
rather than importing it, so a cycle that a lazy import hides at run time is found too.
"""
from __future__ import annotations

import ast
import functools
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent / "labeler"

# The flow, bottom up: a module may import its own group and groups of lower rank only.
# (The package's own __init__ re-exports the public API from every stage and is left out.)
RANKS = {
    "foundation": 0,   # settings, column contracts, errors, engines, text vectors, shared report helpers
    "taxonomy": 1,     # items -> topics
    "labels": 2,       # interactions + item topics -> labels and footprints
    "store": 3,        # footprints -> lookups
    "rollout": 3,      # two taxonomies -> what a change moves
    "evaluation": 3,   # recommendations + labels -> metrics
    "job": 4,          # the scheduled run of the stages
    "demo": 5,         # the invented scenario, running every stage
    "cli": 6,          # the command line over all of it
}
FOUNDATION = {"config", "errors", "tables", "version", "engines", "embed", "distilled", "report", "demo_catalog"}


def _module_name(path: Path) -> str:
    parts = ["labeler", *path.relative_to(ROOT).with_suffix("").parts]
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in ROOT.rglob("*.py")}


def _imports(name: str, path: Path, known: set[str]) -> set[str]:
    """The labeler modules that ``name`` imports (a name imported from a package counts as that
    submodule when it is one, else as the package)."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module or ""
            targets = [f"{stem}.{a.name}" if f"{stem}.{a.name}" in known else stem for a in node.names]
        else:
            continue
        for target in targets:
            while target and target not in known:  # `import labeler.x.y as z` -> the deepest known module
                target = target.rpartition(".")[0]
            if target.startswith("labeler") and target != name:
                found.add(target)
    return found


@functools.cache
def _graph() -> dict[str, set[str]]:
    modules = _modules()
    return {name: _imports(name, path, set(modules)) for name, path in modules.items()}


def _group(module: str) -> str:
    parts = module.split(".")
    if len(parts) == 1:
        return "root"
    return "foundation" if parts[1] in FOUNDATION else parts[1]


def test_the_graph_reads_real_imports():
    """The walk finds imports that are known to exist (relative, absolute and inside functions),
    so an empty graph cannot pass the checks below."""
    g = _graph()
    assert "labeler.labels.rules" in g["labeler.labels.plan"]
    assert "labeler.store.publish" in g["labeler.job.run"]
    assert "labeler.rollout.check" in g["labeler.job.run"]  # imported inside a method
    assert len(g) > 40


def test_no_import_cycle_in_the_package():
    """No module of labeler/ reaches itself through its imports (Tarjan's strongly connected
    components: every component must be a single module)."""
    g = _graph()
    index, low, stack, on, cycles, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in sorted(g.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                cycles.append(sorted(component))

    for v in sorted(g):
        if v not in index:
            visit(v)
    assert cycles == []


@pytest.mark.parametrize("module", sorted(m for m in _modules() if m != "labeler"))
def test_imports_follow_the_flow_one_way(module):
    """A module imports only its own stage and the stages below it: the CLI and the job above the
    stages (taxonomy, labels, then store, rollout and evaluation), the stages above the settings,
    tables, engines and shared helpers."""
    mine = _group(module)
    upward = sorted(t for t in _graph()[module] if _group(t) != mine and (
        _group(t) == "root" or RANKS[_group(t)] >= RANKS[mine]))
    assert upward == [], f"{module} ({mine}) imports {upward}"


def test_every_module_has_a_group():
    """A new top-level module must be placed in the flow (FOUNDATION or a stage package)."""
    assert sorted({_group(m) for m in _modules()} - set(RANKS) - {"root"}) == []


def test_the_readme_layout_names_every_part_of_the_tree():
    """README's Layout block names every top-level module and folder of labeler/, and every module
    of the three stage packages that were flat files before (labels/, rollout/, evaluation/)."""
    readme = (ROOT.parent / "README.md").read_text()
    block = readme[readme.index("## Layout"):]
    block = block[block.index("```"):]
    block = block[:block.index("```", 3)]
    wanted = [p.name + ("/" if p.is_dir() else "") for p in ROOT.iterdir()
              if p.name not in ("__init__.py", "__pycache__") and (p.suffix == ".py" or (p / "__init__.py").exists())]
    wanted += [p.name for stage in ("labels", "rollout", "evaluation") for p in (ROOT / stage).glob("*.py")
               if p.name != "__init__.py"]
    assert [w for w in sorted(wanted) if w not in block] == []
