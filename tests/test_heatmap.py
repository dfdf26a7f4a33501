"""The --map picture for known error patterns."""

from __future__ import annotations

import numpy as np

from gradprobe.render.heatmap import fold, tensor_map
from gradprobe.report.model import TensorResult


def _tensor(errors: np.ndarray) -> TensorResult:
    return TensorResult(name="W", layer="W", kind="param", shape=errors.shape, dtype="float64",
                        checked=int(np.isfinite(errors).sum()), failed=1, kinks=0, status="fail",
                        error_map=errors)


def test_row_and_column_pattern():
    errors = np.full((4, 6), 1e-9)
    errors[1, :] = 0.5  # a wrong row: 5e5 x the threshold
    errors[:, 4] = 2e-5  # a slightly wrong column: 20 x
    errors[3, 0] = np.nan  # not checked
    text = tensor_map(_tensor(errors), 1e-6, colour=False).plain
    assert text == "\n".join([
        "W: 4 rows x 6 columns",
        "  ....-.",
        "  ####-#",  # the column was written after the row
        "  ....-.",
        "   ...-.",
    ])


def test_higher_dimensions_are_folded_and_said_so():
    rows, cols, how = fold((2, 3, 5))
    assert (rows, cols) == (6, 5)
    assert how == "(2, 3, 5) folded to 6 x 5: rows run over axes 0-1, columns over axis 2"
    errors = np.full((2, 3, 5), 1e-9)
    errors[1, 2, 4] = 1.0
    lines = tensor_map(_tensor(errors), 1e-6, colour=False).plain.splitlines()
    assert lines[-1] == "  ....%" and all(line == "  ....." for line in lines[1:-1])


def test_large_maps_show_the_worst_of_each_block():
    errors = np.full((1, 200), 1e-9)
    errors[0, 150] = 1e-3
    text = tensor_map(_tensor(errors), 1e-6, colour=False).plain.splitlines()
    assert "each cell is the worst of 1 x 4 elements" in text[0]
    assert text[1] == "  " + "." * 37 + "+" + "." * 12  # 1e-3 is 1000x the threshold


def test_small_tensors_are_shown_element_by_element():
    """A 30x4 tensor (more rows than a reduced map has) keeps one character per element."""
    errors = np.full((30, 4), 1e-9)
    errors[::2, 1] = 0.5  # every other row of one column: a pattern 2x1 blocks would hide
    lines = tensor_map(_tensor(errors), 1e-6, colour=False).plain.splitlines()
    assert lines[0] == "W: 30 rows x 4 columns" and len(lines) == 31
    assert lines[1:3] == ["  .#..", "  ...."]


def test_maps_fit_the_width():
    errors = np.full((1, 100), 1e-9)
    assert len(tensor_map(_tensor(errors), 1e-6, colour=False, width=120).plain.splitlines()[1]) == 102
    narrow = tensor_map(_tensor(errors), 1e-6, colour=False, width=60).plain.splitlines()
    assert "each cell is the worst of 1 x 2 elements" in narrow[0] and len(narrow[1]) <= 60


def test_a_sampled_tensors_map_holds_only_its_checked_elements():
    """A 120,000-element weight checked on a sample: the map keeps the sampled elements' errors
    (the report stays small) and reads as the dense array, NaN where not checked."""
    from gradprobe import probe

    rng = np.random.default_rng(4)
    w = rng.normal(size=(300, 400))
    report = probe(lambda p, i: float(np.sum(np.sin(p["w"]))), lambda p, i: {"w": np.cos(p["w"])},
                   {"w": w}, sample=24, directions=0)
    t = report.tensor("w")
    dense = np.asarray(t.error_map)
    assert dense.shape == (300, 400) and np.count_nonzero(~np.isnan(dense)) == t.checked == 24
    assert t.error_map.rel.size == 24  # not a dense array behind it
