"""The package's layers: each module imports only from its own layer or the layers below.

The data's path, from the floor up (the module map in DEVELOPERS.md follows this table):

0. the floor: the shared vocabulary (``model.py``), the statistics (``stats/``), errors,
   clock, calendar periods, redaction, logging set-up;
1. variants behind small protocols: database engines (``engines/``), test methods
   (``methods/``), alert sinks (``delivery/sinks/``);
2. ``config.py`` (each variant parses its own part of the config);
3. ``source/``; 4. ``analysis.py``, ``adjustment.py``, ``decisions.py``; 5. ``events.py``; 6. ``store/``;
7. ``delivery/relay.py``, ``present/``; 8. ``runner.py``; 9. ``scheduler.py``;
10. ``cli.py``, ``__main__.py``.

Every import counts, at module level or inside a function (a late import is still a
dependency), except those under ``if TYPE_CHECKING:`` (type names only). Read from the
source with :mod:`ast`, nothing is imported. The checks: every module has a layer (a new
module must be placed), no import reaches a higher layer, the imports form no circle, and
every module appears in DEVELOPERS.md's module map.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PKG = ROOT / "monitor"

#: (layer, module-name patterns): the first pattern a module matches gives its layer.
LAYERS: list[tuple[int, tuple[str, ...]]] = [
    (0, ("monitor", "monitor.model", "monitor.errors", "monitor.clock", "monitor.periods", "monitor.redact",
         "monitor.logs", "monitor.stats", "monitor.stats.*")),
    (1, ("monitor.engines", "monitor.engines.*", "monitor.methods", "monitor.methods.*", "monitor.delivery",
         "monitor.delivery.sinks", "monitor.delivery.sinks.*", "monitor.delivery.digest")),
    (2, ("monitor.config",)),
    (3, ("monitor.source", "monitor.source.*")),
    (4, ("monitor.analysis", "monitor.adjustment", "monitor.decisions")),
    (5, ("monitor.events",)),
    (6, ("monitor.store", "monitor.store.*")),
    (7, ("monitor.delivery.relay", "monitor.present", "monitor.present.*")),
    (8, ("monitor.runner",)),
    (9, ("monitor.scheduler",)),
    (10, ("monitor.cli", "monitor.__main__")),
]


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PKG.rglob("*.py")):
        parts = list(path.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = path
    return out


MODULES = _modules()


def layer_of(module: str) -> int | None:
    for layer, patterns in LAYERS:
        for pat in patterns:
            if module == pat or (pat.endswith(".*") and module.startswith(pat[:-1])):
                return layer
    return None


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _resolve(module: str, is_package: bool, node: ast.ImportFrom | ast.Import) -> list[str]:
    """The package modules an import statement reaches (outside modules are left out)."""
    if isinstance(node, ast.Import):
        names = [a.name for a in node.names]
    else:
        if node.level:
            base = module.split(".") if is_package else module.split(".")[:-1]
            base = base[:len(base) - (node.level - 1)]
            prefix = ".".join(base + ([node.module] if node.module else []))
        else:
            prefix = node.module or ""
        # ``from pkg import sub`` reaches the module pkg.sub when there is one, else pkg itself
        names = [f"{prefix}.{a.name}" if f"{prefix}.{a.name}" in MODULES else prefix for a in node.names]
    found = []
    for name in names:
        while name and name not in MODULES:  # ``import monitor.stats.summary as s`` and the like
            name = name.rpartition(".")[0]
        if name.startswith("monitor"):
            found.append(name)
    return found


def imports(module: str) -> set[str]:
    """Every package module ``module`` imports at run time (TYPE_CHECKING blocks left out)."""
    path = MODULES[module]
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found: set[str] = set()

    def visit(node: ast.AST) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and _is_type_checking(child):
                for sub in child.orelse:
                    visit(sub)
                continue
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                found.update(_resolve(module, path.name == "__init__.py", child))
            visit(child)

    visit(tree)
    found.discard(module)
    return found


GRAPH = {m: imports(m) for m in MODULES}


def test_every_module_has_a_layer():
    missing = [m for m in MODULES if layer_of(m) is None]
    assert not missing, f"place these modules in a layer (tests/test_layers.py LAYERS and DEVELOPERS.md): {missing}"


def test_no_module_imports_from_a_higher_layer():
    upward = [f"{m} (layer {layer_of(m)}) imports {t} (layer {layer_of(t)})"
              for m, targets in sorted(GRAPH.items()) for t in sorted(targets)
              if t != "monitor" and (layer_of(t) or 0) > (layer_of(m) or 0)]
    assert not upward, "\n".join(upward)


def test_the_floor_imports_nothing_above_it():
    # the vocabulary and the statistics sit at the bottom: no SQL, no config, no history
    floor = [m for m in MODULES if layer_of(m) == 0]
    assert "monitor.model" in floor and "monitor.stats.summary" in floor
    reach = {t for m in floor for t in GRAPH[m] if layer_of(t) != 0}
    assert reach == set(), reach


def test_the_imports_form_no_circle():
    # package __init__ modules that only name their submodules are not edges of a circle
    graph = {m: {t for t in ts if t != "monitor"} for m, ts in GRAPH.items()}
    state: dict[str, int] = {}
    path: list[str] = []
    circles: list[list[str]] = []

    def walk(m: str) -> None:
        state[m] = 1
        path.append(m)
        for t in sorted(graph.get(m, ())):
            if state.get(t) == 1:
                circles.append(path[path.index(t):] + [t])
            elif t not in state:
                walk(t)
        path.pop()
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            walk(m)
    # a package importing its own submodules (its registry) and them importing the package's
    # shared names is one unit, not a circle across layers
    across = [c for c in circles if len({layer_of(x) for x in c}) > 1 or not _one_package(c)]
    assert not across, "\n".join(" -> ".join(c) for c in across)


def _one_package(circle: list[str]) -> bool:
    heads = {".".join(m.split(".")[:2]) for m in circle}
    return len(heads) == 1 and any(m in heads for m in circle)


def test_the_checker_sees_an_upward_import(tmp_path):
    # the checks can fail: a floor module importing the history is caught
    node = ast.parse("from .store.history import History\n").body[0]
    (target,) = _resolve("monitor.model", False, node)
    assert target == "monitor.store.history" and layer_of(target) > layer_of("monitor.model")
    node = ast.parse("from monitor import methods\n").body[0]
    assert _resolve("monitor.config", False, node) == ["monitor.methods"]


def test_the_module_map_in_developers_md_names_every_module():
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    table = text[text.index("## Map of modules"):]
    table = table[:table.index("\n## ", 3)]
    named = set()
    for cell in re.findall(r"`([^`]+)`", table):
        m = re.fullmatch(r"([a-z_/]+)/\{([a-z_,]+)\}\.py", cell)  # engines/{sqlite,postgresql}.py
        if m:
            named.update(f"{m.group(1)}/{x}.py" for x in m.group(2).split(","))
        elif cell.endswith(".py"):
            named.add(cell)
    wanted = {str(p.relative_to(PKG)) for p in MODULES.values() if p.name != "__init__.py"}
    missing = sorted(w for w in wanted if w not in named)
    assert not missing, f"DEVELOPERS.md's module map lacks rows for: {missing}"
    gone = sorted(n for n in named if n.endswith(".py") and not n.startswith("tests/")
                  and not (PKG / n).exists() and not (ROOT / n).exists())
    assert not gone, f"DEVELOPERS.md's module map names modules that do not exist: {gone}"
