"""`record` (monitor/base/records.py) against the standard library's ``dataclasses``
(PEP 557, "Data Classes"; CPython's ``dataclasses.dataclass`` is the reference): the same
class built both ways behaves the same under construction, defaults and factories,
``__post_init__``, repr, equality, hashing, frozen assignment, ``replace``, ``asdict``,
``fields``, ``__match_args__`` and pickling.
"""

import dataclasses
import pickle
from dataclasses import field

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.base.records import record

# one field: (has a default, a factory instead, in repr, compared, in __init__)
FIELD = st.tuples(st.booleans(), st.booleans(), st.booleans(), st.booleans(), st.booleans())


def _namespace(specs):
    """Annotations and defaults of a class with the fields `specs`; defaults only after the
    last field without one (as Python requires)."""
    ann, ns = {}, {}
    seen_default = False
    for k, (dflt, factory, rep, cmp, init) in enumerate(specs):
        name = f"f{k}"
        ann[name] = "int"
        if not init:  # left out of __init__: it needs a value from somewhere
            dflt = True
        if dflt or seen_default:
            seen_default = True
            kwargs = {"repr": rep, "compare": cmp, "init": init}
            ns[name] = (field(default_factory=lambda k=k: 100 + k, **kwargs) if factory
                        else field(default=k, **kwargs))
        else:
            ns[name] = field(repr=rep, compare=cmp)
    ns["__annotations__"] = ann
    ns["__doc__"] = "A test class."
    return ns


def _pair(specs, frozen=True, post_init=False):
    """The same class as a dataclass and as a record."""
    def make(deco):
        ns = _namespace(specs)
        if post_init:
            def __post_init__(self):
                object.__setattr__(self, "seen", sum(getattr(self, f.name)
                                                      for f in dataclasses.fields(self)))
            ns["__post_init__"] = __post_init__
        return deco(type("Thing", (), ns))
    return (make(dataclasses.dataclass(frozen=frozen)),
            make(record if frozen else record(frozen=False)))


def _build(cls, args, kwargs):
    try:
        return cls(*args, **kwargs)
    except TypeError:
        return TypeError


@settings(max_examples=300, deadline=None)
@given(st.lists(FIELD, max_size=6), st.lists(st.integers(-3, 3), max_size=8),
       st.dictionaries(st.sampled_from([f"f{k}" for k in range(7)]), st.integers(-3, 3),
                       max_size=4), st.booleans(), st.booleans())
def test_record_behaves_as_the_dataclass(specs, args, kwargs, frozen, post_init):
    ref, rec = _pair(specs, frozen, post_init)
    a, r = _build(ref, args, kwargs), _build(rec, args, kwargs)
    if a is TypeError or r is TypeError:
        assert a is r  # both refuse the same arguments
        return
    assert repr(a) == repr(r)
    assert dataclasses.asdict(a) == dataclasses.asdict(r)
    assert [f.name for f in dataclasses.fields(a)] == [f.name for f in dataclasses.fields(r)]
    assert ref.__match_args__ == rec.__match_args__
    if post_init:
        assert a.seen == r.seen
    a2, r2 = _build(ref, [], {}), _build(rec, [], {})
    if a2 is not TypeError:
        assert (a == a2) == (r == r2)
    assert (a == a) and (r == r) and (r != a)  # another class never equals
    if frozen:
        assert hash(a) == hash(r)  # the same tuple of the same fields
        for name in [f.name for f in dataclasses.fields(a)] + ["other"]:
            with pytest.raises(dataclasses.FrozenInstanceError) as ea:
                setattr(a, name, 1)
            with pytest.raises(dataclasses.FrozenInstanceError) as er:
                setattr(r, name, 1)
            assert str(ea.value) == str(er.value)
        if specs:
            with pytest.raises(dataclasses.FrozenInstanceError):
                delattr(r, "f0")
    else:
        assert ref.__hash__ is None and rec.__hash__ is None  # eq without frozen: unhashable
        if specs:
            a.f0, r.f0 = 7, 7
            assert repr(a) == repr(r)
    init = [f.name for f in dataclasses.fields(a) if f.init]
    if init:
        change = {init[-1]: 42}
        assert repr(dataclasses.replace(a, **change)) == repr(dataclasses.replace(r, **change))


@record
class Settings:
    """Module level, so that pickle can find it."""

    rate: int
    name: str = "x"
    tags: tuple = ()
    extra: list = field(default_factory=list, compare=False)


def test_pickling_and_copies_keep_a_record():
    s = Settings(16000, tags=("a",))
    assert pickle.loads(pickle.dumps(s)) == s
    assert dataclasses.replace(s, rate=8000).rate == 8000
    assert Settings(1).extra is not Settings(1).extra  # a factory runs per instance


def test_a_record_refuses_methods_it_would_replace():
    with pytest.raises(TypeError, match="__repr__"):
        @record
        class Own:
            """A class with its own repr."""

            a: int

            def __repr__(self):
                return "mine"


def test_a_record_refuses_keyword_only_fields():
    with pytest.raises(TypeError, match="kw_only"):
        @record
        class Keyed:
            """A class with a keyword-only field."""

            a: int = field(default=0, kw_only=True)


def test_a_plain_subclass_may_add_attributes_but_not_change_fields():
    # a frozen dataclass (PEP 557) refuses any name on the class itself, only its fields on
    # a subclass that is not a dataclass
    class Labelled(Settings):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            self.note = "kept"

    s = Labelled(8000)
    assert s.note == "kept"
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.rate = 1
    with pytest.raises(dataclasses.FrozenInstanceError):
        Settings(1).note = "no"
