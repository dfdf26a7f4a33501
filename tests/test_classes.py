"""gradprobe's own ``dataclass`` (common/classes.py) behaves as the standard library's.

Reference: Python's ``dataclasses.dataclass`` itself. The same class body is decorated by
both and every behaviour a caller can see is compared: fields, defaults, default factories,
``__post_init__``, ``replace``, ``asdict``, equality, hashing, repr, frozenness and the
signature of ``__init__``. Not timed (the start-up it saves is measured by bench/cost.py).
"""

from __future__ import annotations

import dataclasses
import inspect
import pickle
from typing import Any

import pytest

from gradprobe.common.classes import dataclass


def _pair(frozen: bool) -> tuple[type, type]:
    def body() -> type:
        class Reading:
            """Readings of one field sensor."""

            station: str
            depth: float
            samples: tuple[float, ...] = ()
            notes: dict = dataclasses.field(default_factory=dict)
            calibration: Any = dataclasses.field(default=None, compare=False, repr=False)
            checked: int = dataclasses.field(default=0, metadata={"unit": "count"})

            def __post_init__(self) -> None:
                if self.depth < 0:
                    raise ValueError("depth must be 0 or more")

            @property
            def mean(self) -> float:
                return sum(self.samples) / max(len(self.samples), 1)

        return Reading

    ours, standard = body(), body()
    options = {"frozen": True} if frozen else {}
    return dataclass(**options)(ours), dataclasses.dataclass(**options)(standard)


@pytest.mark.parametrize("frozen", [False, True])
def test_the_same_behaviour_as_the_standard_decorator(frozen):
    ours, standard = _pair(frozen)
    assert ours.__repr__ is not standard.__repr__
    assert ours.__repr__.__module__ == "gradprobe.common.classes"  # the fast path was taken
    assert [(f.name, f.type, f.default, f.compare, f.repr, dict(f.metadata)) for f in dataclasses.fields(ours)] \
        == [(f.name, f.type, f.default, f.compare, f.repr, dict(f.metadata)) for f in dataclasses.fields(standard)]
    assert str(inspect.signature(ours)) == str(inspect.signature(standard))
    assert ours.__match_args__ == standard.__match_args__
    assert dataclasses.is_dataclass(ours) and ours.__dataclass_params__.frozen is frozen
    for cls in (ours, standard):
        a = cls("north", 1.5, (2.0, 4.0), calibration=object())
        b = cls("north", 1.5, (2.0, 4.0), calibration=object())  # compare=False: still equal
        c = dataclasses.replace(a, depth=2.5)
        assert a == b and a != c and a != ("north", 1.5) and a.mean == 3.0
        assert a.notes == {} and a.notes is not b.notes  # a fresh dict each
        assert c.depth == 2.5 and c.station == "north" and c.samples == (2.0, 4.0)
        assert dataclasses.asdict(a)["samples"] == (2.0, 4.0)
        assert cls.samples == () and cls.checked == 0 and not hasattr(cls, "notes")
        with pytest.raises(ValueError, match="depth"):
            cls("south", -1.0)
        with pytest.raises(TypeError):
            cls("south")  # depth has no default
        if frozen:
            with pytest.raises(dataclasses.FrozenInstanceError):
                a.depth = 3.0  # type: ignore[misc]
            with pytest.raises(dataclasses.FrozenInstanceError):
                del a.station  # type: ignore[misc]
            assert hash(cls("west", 1.0, notes=())) == hash(cls("west", 1.0, notes=()))
            with pytest.raises(TypeError, match="unhashable"):
                hash(cls("west", 1.0))  # its default notes are a dict
        else:
            a.depth = 3.0
            assert a.depth == 3.0 and cls.__hash__ is None
    simple_ours, simple_std = ours("east", 0.5), standard("east", 0.5)
    assert repr(simple_ours).replace(ours.__qualname__, "R") == repr(simple_std).replace(standard.__qualname__, "R")
    assert "calibration" not in repr(simple_ours)  # repr=False left out


def test_a_subclass_of_a_frozen_class_may_set_its_own_attributes():
    ours, standard = _pair(frozen=True)
    for cls in (ours, standard):
        sub = type("Sub", (cls,), {})
        s = sub("east", 0.5)
        s.extra = 1  # not a field, not the decorated class: allowed by the standard too
        with pytest.raises(dataclasses.FrozenInstanceError):
            s.depth = 1.0


def test_forms_it_does_not_build_go_to_the_standard_decorator():
    @dataclass(order=True)
    class Ordered:
        rank: int

    assert Ordered(1) < Ordered(2)  # order=True: the standard decorator's __lt__

    @dataclass
    class Base:
        plot: str

    @dataclass
    class Child(Base):
        yield_t: float = 0.0

    assert [f.name for f in dataclasses.fields(Child)] == ["plot", "yield_t"]
    assert Child("a", 2.0) == Child("a", 2.0)
    with pytest.raises(ValueError, match="mutable default"):
        @dataclass
        class Bad:
            tags: list = []  # noqa: RUF012 - the standard decorator's own error
    with pytest.raises(TypeError, match="non-default argument"):
        @dataclass
        class Unordered:
            a: int = 0
            b: int  # type: ignore[misc]


def test_gradprobe_report_objects_pickle_and_compare():
    from gradprobe.common.status import Status
    from gradprobe.report.model import TensorResult

    t = TensorResult(name="hidden.W", layer="hidden", kind="param", shape=(2, 3), dtype="float64",
                     checked=6, failed=0, kinks=0, status=Status.PASS)
    assert pickle.loads(pickle.dumps(t)) == t
    assert dataclasses.replace(t, failed=1) != t and hash(t) == hash(dataclasses.replace(t))
    assert TensorResult.__repr__.__module__ == "gradprobe.common.classes"


def test_every_gradprobe_class_uses_this_dataclass():
    # The start-up it saves is lost by any module that takes the standard one directly.
    import re
    from pathlib import Path

    package = Path(__file__).resolve().parent.parent / "gradprobe"
    direct = [str(p.relative_to(package)) for p in package.rglob("*.py")
              if p.name != "classes.py" and re.search(
                  r"^from dataclasses import .*\bdataclass\b|@dataclasses\.dataclass",
                  p.read_text(), re.M)]
    assert direct == [], f"import dataclass from gradprobe.common.classes in {direct}"
