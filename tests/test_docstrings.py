"""Every public function and class of the package carries a numpydoc docstring: a
``Parameters`` section when it takes arguments, ``Returns`` (or ``Yields``) when it gives a
value back, ``Raises`` when its own body raises.

The sections are the numpydoc standard's (numpydoc's "Style guide", the format librosa,
numpy and scipy write): a section title on its own line, underlined with dashes. Public
means a top-level name without a leading underscore in a module without one. The check
reads the source (ast), so it needs no import of TensorFlow or textual.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "monitor"
SECTION = re.compile(r"^\s*(Parameters|Returns|Yields|Raises|Attributes)\s*\n\s*-{3,}\s*$", re.M)


def sections(doc: str | None) -> set[str]:
    """The numpydoc section titles a docstring has."""
    return set(SECTION.findall(doc or ""))


def _own_nodes(fn: ast.AST):
    """The nodes of a function's own body (not of functions or classes defined inside it)."""
    todo = list(ast.iter_child_nodes(fn))
    while todo:
        n = todo.pop()
        if isinstance(n, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Lambda)):
            continue
        yield n
        todo.extend(ast.iter_child_nodes(n))


def _takes_arguments(fn: ast.FunctionDef, method: bool) -> bool:
    a = fn.args
    names = [x.arg for x in a.posonlyargs + a.args + a.kwonlyargs]
    if method and names and names[0] in ("self", "cls"):
        names = names[1:]
    return bool(names or a.vararg or a.kwarg)


def _gives_back(fn: ast.FunctionDef) -> str | None:
    """"Yields" for a generator, "Returns" when it returns a value, else None."""
    own = list(_own_nodes(fn))
    if any(isinstance(n, (ast.Yield, ast.YieldFrom)) for n in own):
        return "Yields"
    if fn.returns is not None:
        r = fn.returns
        if isinstance(r, ast.Constant) and r.value in (None, "None"):
            return None
        if isinstance(r, ast.Name) and r.id in ("None", "NoReturn"):
            return None
        return "Returns"
    if any(isinstance(n, ast.Return) and n.value is not None for n in own):
        return "Returns"
    return None


def _raises(fn: ast.FunctionDef) -> bool:
    """True when the function's own body raises (a bare re-raise aside)."""
    return any(isinstance(n, ast.Raise) and n.exc is not None for n in _own_nodes(fn))


def _is_dataclass(cls: ast.ClassDef) -> bool:
    for d in cls.decorator_list:
        target = d.func if isinstance(d, ast.Call) else d
        name = target.attr if isinstance(target, ast.Attribute) else getattr(target, "id", "")
        if name in ("dataclass", "record"):
            return True
    return False


def _is_protocol(cls: ast.ClassDef) -> bool:
    return any((isinstance(b, ast.Name) and b.id in ("Protocol", "Enum", "IntEnum", "NamedTuple"))
               or (isinstance(b, ast.Attribute) and b.attr == "Protocol") for b in cls.bases)


def missing(node: ast.AST) -> list[str]:
    """The numpydoc sections a public top-level function or class lacks."""
    doc = ast.get_docstring(node)
    if not doc:
        return ["docstring"]
    have = sections(doc)
    need: list[str] = []
    if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
        if _takes_arguments(node, method=False):
            need.append("Parameters")
        back = _gives_back(node)
        if back:
            need.append(back)
        if _raises(node):
            need.append("Raises")
    elif isinstance(node, ast.ClassDef) and not _is_protocol(node):
        init = next((n for n in node.body if isinstance(n, ast.FunctionDef)
                     and n.name == "__init__"), None)
        fields = [n for n in node.body if isinstance(n, ast.AnnAssign)
                  and isinstance(n.target, ast.Name) and "ClassVar" not in ast.unparse(n.annotation)]
        if (init is not None and _takes_arguments(init, method=True)) or (
                init is None and _is_dataclass(node) and fields):
            if "Parameters" not in have and "Attributes" not in have:
                need.append("Parameters")
        if init is not None and _raises(init):
            need.append("Raises")
    return [s for s in need if s not in have and s != "Parameters" or
            (s == "Parameters" and "Parameters" not in have and "Attributes" not in have)]


def public_definitions():
    """(module path, name, node) of every public top-level function and class."""
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE.parent)
        if any(part.startswith("_") and part != "__init__.py" for part in rel.parts):
            continue
        for node in ast.parse(path.read_text(), str(path)).body:
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)) \
                    and not node.name.startswith("_"):
                yield rel, node.name, node


def test_every_public_definition_has_its_numpydoc_sections():
    lacking = [f"{rel}:{node.lineno} {name}: {', '.join(m)}"
               for rel, name, node in public_definitions() if (m := missing(node))]
    assert lacking == [], f"{len(lacking)} public definitions lack numpydoc sections:\n" + \
        "\n".join(lacking)


def _first(src: str) -> ast.AST:
    return ast.parse(src).body[0]


def test_the_check_reads_numpydoc_sections():
    # the rule itself, on small examples written to the numpydoc style guide
    good = _first('''
def f(x, *, y=1):
    """Add.

    Parameters
    ----------
    x : int
        A number.
    y : int
        Another.

    Returns
    -------
    int
        The sum.

    Raises
    ------
    ValueError
        When x is negative.
    """
    if x < 0:
        raise ValueError(x)
    return x + y
''')
    assert missing(good) == []
    bare = _first('def f(x):\n    """Add."""\n    if x:\n        raise ValueError(x)\n    return x\n')
    assert missing(bare) == ["Parameters", "Returns", "Raises"]
    gen = _first('def g(n: int):\n    """Count.\n\n    Parameters\n    ----------\n    n : int\n'
                 '        How many.\n    """\n    yield from range(n)\n')
    assert missing(gen) == ["Yields"]
    nothing = _first('def h() -> None:\n    """Do nothing."""\n')
    assert missing(nothing) == []
    data = _first('@dataclass\nclass C:\n    """A record."""\n    a: int\n')
    assert missing(data) == ["Parameters"]
