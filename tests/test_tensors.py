"""Flattening nested mappings of arrays."""

from __future__ import annotations

import numpy as np
import pytest

from gradprobe import TargetLoadError
from gradprobe.common.tensors import flatten, unflatten


def test_nested_names_are_dotted_in_insertion_order():
    tree = {"b": {"W": 1, "c": {"x": 2}}, "a": 3}
    assert list(flatten(tree)) == ["b.W", "b.c.x", "a"]


def test_unflatten_restores_the_nesting():
    tree = {"b": {"W": np.ones(2)}, "a": np.zeros(1)}
    assert unflatten(flatten(tree), tree).keys() == tree.keys()


def test_a_mapping_that_contains_itself_deeper_down():
    tree: dict = {"x": {"y": {}}}
    tree["x"]["y"]["z"] = tree["x"]
    with pytest.raises(TargetLoadError) as info:
        flatten(tree, what="inputs")
    assert str(info.value) == (
        "inputs contains itself at 'x.y.z', so it has no end to flatten into arrays.")


def test_the_same_mapping_twice_side_by_side_is_fine():
    """Sharing is not a cycle: the same dict under two names flattens twice."""
    shared = {"w": 1}
    assert flatten({"a": shared, "b": shared}) == {"a.w": 1, "b.w": 1}
