"""The package's layout: imports point only down the data flow, and no module imports itself
back through others (no cycle, type-only imports included).

The rule is written once, here: `LAYERS` lists the subpackages from the bottom of the flow
to the top. A module may import its own subpackage and any subpackage of a lower layer;
subpackages in the same layer (the tools on top of the composition root) do not import each
other. Every import counts, at the top of a module, inside a function or under
``TYPE_CHECKING``: a circle drawn by a type annotation is still a circle for a reader.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "monitor"

# bottom first; each row is one layer
LAYERS: list[tuple[str, ...]] = [
    ("base",),  # errors, files, native calls, palette: used by everyone
    ("sound",),  # where sound comes from: samples, ring, windower, sources
    ("features",),  # how a window becomes features: card, stages, front end, card check
    ("inference",),  # how features become probabilities: runners, micro, profiles
    ("decisions",),  # how probabilities become decisions: smoothing, hysteresis, tallies
    ("session",),  # what a session is on disk
    ("assembly",),  # the composition root that assembles one run
    ("review", "device", "demo", "ui", "web"),  # tools on top of the chain
    ("cli",),  # the command line collects the commands
]
LAYER = {pkg: i for i, row in enumerate(LAYERS) for pkg in row}


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> list[tuple[int, str]]:
    """(line, imported module) of every import of a ``monitor`` module in a file."""
    tree = ast.parse(path.read_text(), str(path))
    me = _module_name(path)
    pkg = me if path.name == "__init__.py" else me.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names if a.name.startswith("monitor")]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[: len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            if not mod.startswith("monitor"):
                continue
            for a in node.names:  # `from monitor.x import y` may name a module y
                sub = f"{mod}.{a.name}"
                found.append((node.lineno, sub if _exists(sub) else mod))
    return found


def _exists(module: str) -> bool:
    p = PACKAGE.parent.joinpath(*module.split("."))
    return p.with_suffix(".py").is_file() or (p / "__init__.py").is_file()


def _modules() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


def _subpackage(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in LAYER else None


def test_every_subpackage_has_a_layer_and_says_what_it_owns():
    found = {p.name for p in PACKAGE.iterdir() if (p / "__init__.py").is_file()}
    assert found == set(LAYER), f"subpackages without a layer or layers without one: {found ^ set(LAYER)}"
    for name in found:
        doc = ast.get_docstring(ast.parse((PACKAGE / name / "__init__.py").read_text()))
        assert doc and "May import" in doc, f"monitor/{name}/__init__.py must say what it owns and may import"
    loose = sorted(p.name for p in PACKAGE.glob("*.py") if p.name not in ("__init__.py", "__main__.py"))
    assert loose == [], f"modules outside a subpackage: {loose}"


def _upward(me: str, others: list[str]) -> list[str]:
    """The modules in `others` that module `me` may not import (same layer or above)."""
    mine = _subpackage(me)
    if mine is None:
        return []
    return [o for o in others
            if _subpackage(o) not in (None, mine) and LAYER[_subpackage(o)] >= LAYER[mine]]


def test_imports_point_only_down_the_flow():
    bad = []
    for path in _modules():
        me = _module_name(path)
        for line, other in _imports(path):
            if _upward(me, [other]):
                bad.append(f"{path.relative_to(PACKAGE.parent)}:{line} imports {other}")
    assert bad == [], "\n".join(bad)


def test_the_rule_refuses_upward_and_sideways_imports():
    assert _upward("monitor.base.errors", ["monitor.cli.flags"]) == ["monitor.cli.flags"]
    assert _upward("monitor.review.report", ["monitor.ui.draw"]) == ["monitor.ui.draw"]
    assert _upward("monitor.session.writer", ["monitor.sound.samples", "monitor.session.truth",
                                              "monitor.decisions.contract"]) == []


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(n: str) -> list[str] | None:
        state[n] = 1
        stack.append(n)
        for m in sorted(graph.get(n, ())):
            if state.get(m) == 1:
                return stack[stack.index(m):] + [m]
            if m not in state:
                found = visit(m)
                if found:
                    return found
        stack.pop()
        state[n] = 2
        return None

    for n in sorted(graph):
        if n not in state:
            found = visit(n)
            if found:
                return found
    return None


def test_no_module_imports_itself_back():
    graph: dict[str, set[str]] = {}
    for path in _modules():
        me = _module_name(path)
        graph[me] = {m for _, m in _imports(path) if m != me and m != "monitor"}
    cycle = _cycle(graph)
    assert cycle is None, " -> ".join(cycle or [])


@pytest.mark.parametrize("graph, expected", [
    ({"a": {"b"}, "b": {"c"}, "c": set()}, None),
    ({"a": {"b"}, "b": {"a"}}, ["a", "b", "a"]),
    ({"a": {"b"}, "b": {"c"}, "c": {"b"}}, ["b", "c", "b"]),
])
def test_the_cycle_finder_finds_cycles(graph, expected):
    # the rule's own check on small graphs (a depth-first search, Tarjan 1972's grey nodes)
    assert _cycle(graph) == expected
