"""`record`: a dataclass whose methods are shared by every record class, not generated.

For each class, ``dataclasses.dataclass`` writes the source of ``__init__``, ``__repr__``,
``__eq__``, ``__hash__`` and, when frozen, ``__setattr__`` and ``__delattr__``, and compiles
each with ``exec``: about 0.45 ms for a frozen class of eight fields under CPython 3.11. A
replay's start-up makes some thirty such classes (the card's stage configs, the plans, the
settings), which was 14 ms of the 95 ms to its first window line.

`record` lets ``dataclasses`` find the fields as usual (so ``dataclasses.fields``,
``replace``, ``asdict`` and pickling work unchanged) but generate nothing, and gives the
class the methods below, written once: they read the class's fields (kept per class after
the first call) and behave as the generated ones do for the classes this project makes (a
test holds them against ``dataclasses.dataclass``). Differences: ``dataclasses`` records the
class as not frozen (do not mix records and ``@dataclass`` in one class hierarchy),
``inspect.signature`` shows ``(*args, **kwargs)``, a repr has no recursion guard, and the
messages for wrong arguments are worded differently. A record is frozen unless made with
``frozen=False``: its fields are set only by ``__init__`` (and by ``__post_init__`` through
``object.__setattr__``, as in a frozen dataclass).

Use it for classes made once or a few times per run (settings, plans, configs, handles);
keep ``@dataclass`` for those made per window (its generated ``__init__`` is faster per call).
Not supported (use ``@dataclass``): ``kw_only`` and ``InitVar`` fields (refused), ``order``,
``slots``.
"""

from __future__ import annotations

import dataclasses
from typing import Any, TypeVar

try:  # Python 3.11+; for type checkers only, so on 3.10 a decorator that changes nothing
    from typing import dataclass_transform
except ImportError:  # pragma: no cover - Python 3.10
    def dataclass_transform(**_: Any):  # noqa: D103
        return lambda f: f

T = TypeVar("T", bound=type)

_SPEC = "__record_spec__"
_FROZEN = "__record_frozen__"


class _Spec:
    """A record class's fields, in the forms its methods need."""

    __slots__ = ("params", "names", "defaults", "factories", "later", "repr", "compare",
                 "hash", "post_init")

    def __init__(self, cls: type) -> None:
        fields = dataclasses.fields(cls)
        self.params = tuple(f.name for f in fields if f.init)
        self.names = frozenset(f.name for f in fields)
        self.defaults = {f.name: f.default for f in fields
                         if f.default is not dataclasses.MISSING}
        self.factories = {f.name: f.default_factory for f in fields
                          if f.default_factory is not dataclasses.MISSING}
        # fields left out of __init__ that still get a value there (a default or a factory)
        self.later = tuple(f.name for f in fields if not f.init
                           and (f.name in self.defaults or f.name in self.factories))
        self.repr = tuple(f.name for f in fields if f.repr)
        self.compare = tuple(f.name for f in fields if f.compare)
        self.hash = tuple(f.name for f in fields
                          if (f.compare if f.hash is None else f.hash))
        self.post_init = getattr(cls, "__post_init__", None)


def _spec(cls: type) -> _Spec:
    spec = cls.__dict__.get(_SPEC)
    if spec is None:
        spec = _Spec(cls)
        type.__setattr__(cls, _SPEC, spec)
    return spec


def _init(self: Any, *args: Any, **kwargs: Any) -> None:
    spec = _spec(type(self))
    name = type(self).__qualname__
    params = spec.params
    if len(args) > len(params):
        raise TypeError(f"{name}.__init__() takes {len(params) + 1} positional arguments "
                        f"but {len(args) + 1} were given")
    values = dict(zip(params, args))
    for key, value in kwargs.items():
        if key not in params:
            raise TypeError(f"{name}.__init__() got an unexpected keyword argument {key!r}")
        if key in values:
            raise TypeError(f"{name}.__init__() got multiple values for argument {key!r}")
        values[key] = value
    put = object.__setattr__
    missing = []
    for p in params:
        if p in values:
            put(self, p, values[p])
        elif p in spec.defaults:
            put(self, p, spec.defaults[p])
        elif p in spec.factories:
            put(self, p, spec.factories[p]())
        else:
            missing.append(p)
    if missing:
        raise TypeError(f"{name}.__init__() missing {len(missing)} required argument(s): "
                        f"{', '.join(repr(m) for m in missing)}")
    for p in spec.later:
        put(self, p, spec.defaults[p] if p in spec.defaults else spec.factories[p]())
    if spec.post_init is not None:
        self.__post_init__()


def _repr(self: Any) -> str:
    spec = _spec(type(self))
    inner = ", ".join(f"{n}={getattr(self, n)!r}" for n in spec.repr)
    return f"{type(self).__qualname__}({inner})"


def _eq(self: Any, other: Any) -> Any:
    if other.__class__ is not self.__class__:
        return NotImplemented
    names = _spec(type(self)).compare
    return tuple(getattr(self, n) for n in names) == tuple(getattr(other, n) for n in names)


def _hash(self: Any) -> int:
    return hash(tuple(getattr(self, n) for n in _spec(type(self)).hash))


def _setattr(self: Any, name: str, value: Any) -> None:
    # as a frozen dataclass: every name on the record class itself, the fields on a subclass
    if _FROZEN in type(self).__dict__ or name in _spec(type(self)).names:
        raise dataclasses.FrozenInstanceError(f"cannot assign to field {name!r}")
    object.__setattr__(self, name, value)


def _delattr(self: Any, name: str) -> None:
    if _FROZEN in type(self).__dict__ or name in _spec(type(self)).names:
        raise dataclasses.FrozenInstanceError(f"cannot delete field {name!r}")
    object.__delattr__(self, name)


_METHODS = {"__init__": _init, "__repr__": _repr, "__eq__": _eq, "__hash__": _hash,
            "__setattr__": _setattr, "__delattr__": _delattr}


@dataclass_transform(frozen_default=True)
def record(cls: T | None = None, /, *, frozen: bool = True) -> Any:
    """Make `cls` a record (module docstring): its fields as a dataclass's, its methods
    shared. ``@record`` is frozen; ``@record(frozen=False)`` lets fields be assigned after
    ``__init__`` and, like a dataclass that is not frozen, has no hash.

    Parameters
    ----------
    cls : type
        A class with annotated fields (defaults and ``dataclasses.field`` as usual); it must
        not define the methods a record gives it.
    frozen : bool
        Refuse assignments to the fields after ``__init__`` (``FrozenInstanceError``).

    Returns
    -------
    type
        The same class (or, without `cls`, a decorator that makes it one).
    """
    def wrap(cls: T) -> T:
        given = {**_METHODS} if frozen else {**_METHODS, "__hash__": None}
        if not frozen:
            del given["__setattr__"], given["__delattr__"]
        own = [m for m in given if m in cls.__dict__]
        if own:
            raise TypeError(f"{cls.__qualname__} defines {', '.join(own)}, which a record "
                            f"gives it")
        cls = dataclasses.dataclass(cls, init=False, repr=False, eq=False)
        # an InitVar's type reads "InitVar[...]" whether it is the object or, with
        # postponed annotations, the text
        odd = [f.name for f in cls.__dataclass_fields__.values()
               if f.kw_only is True or "InitVar" in str(f.type)]
        if odd:
            raise TypeError(f"{cls.__qualname__}: {', '.join(odd)} (kw_only or InitVar) need "
                            f"@dataclass, not @record")
        for name, method in given.items():
            setattr(cls, name, method)
        if frozen:
            type.__setattr__(cls, _FROZEN, True)
        return cls

    return wrap if cls is None else wrap(cls)
