"""Scenarios written from the README and the target protocol alone, run through the command
line as a user would: what a target that could not run leaves in the JSON report, a loss
that is not a real number, and a handful of cross-checks of the protocol's promises against
closed forms (each named beside its check) and sympy."""

from __future__ import annotations

import json

import numpy as np
import pytest

DENSE = """
import numpy as np
def setup():
    rng = np.random.default_rng(7)
    params = {"dense": {"W": rng.normal(size=(3, 2)), "b": np.zeros(2)}}
    inputs = {"x": rng.normal(size=(5, 3)), "y": rng.normal(size=(5, 2))}
    return params, inputs
def forward(params, inputs):
    p = inputs["x"] @ params["dense"]["W"] + params["dense"]["b"]
    return 0.5 * np.sum((p - inputs["y"]) ** 2)
def backward(params, inputs):
    r = inputs["x"] @ params["dense"]["W"] + params["dense"]["b"] - inputs["y"]
    return {"dense": {"W": inputs["x"].T @ r BUG, "b": r.sum(axis=0)}, "x": r @ params["dense"]["W"].T}
"""


def _json(result) -> dict:
    return json.loads(result.stdout)


def test_a_complex_loss_is_bad_output_not_an_internal_error(run_cli, write_target):
    """Protocol section 3: a forward returning a non-numeric value is exit 2 with one
    sentence; a complex loss is no real number to take differences of."""
    write_target("""
        import numpy as np
        params = {"a": np.array([0.5, -1.5])}
        def forward(p, i): return complex(np.sum(p["a"] ** 2))
        def backward(p, i): return {"a": 2 * p["a"]}
    """)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    last = result.stderr.strip().splitlines()[-1]
    assert last.startswith("gradprobe: error: case.py: forward returned a complex")
    assert "Traceback" not in result.stderr


def test_a_complex_loss_with_no_imaginary_part_is_refused_too(run_cli, write_target):
    """A complex dtype with a zero imaginary part is still not the real loss the protocol
    asks for; the sentence says to return its real part."""
    write_target("""
        import numpy as np
        params = {"a": np.array([0.5, -1.5])}
        def forward(p, i): return np.sum(p["a"] ** 2).astype(np.complex128)
        def backward(p, i): return {"a": 2 * p["a"]}
    """)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert "real" in result.stderr.strip().splitlines()[-1]


def test_the_report_of_a_target_that_could_not_run_keeps_every_top_level_key(run_cli, write_target):
    """Protocol sections 4, 5, 6, 7: a reader of the JSON report finds the same top-level
    keys (and summary keys) whether the target ran or not; what is unknown is null."""
    write_target(DENSE.replace("BUG", ""), "ran.py")
    write_target("""
        import numpy as np
        params = {"a": np.ones(3)}
        def forward(p, i): raise ValueError("no readings")
        def backward(p, i): return {"a": 2 * p["a"]}
    """, "broken.py")
    ran = _json(run_cli("check", "ran.py", "--json", "-"))
    result = run_cli("check", "broken.py", "--json", "-", "--method", "richardson")
    assert result.exit_code == 2
    broken = _json(result)
    assert set(ran) - set(broken) == set()
    assert set(ran["summary"]) - set(broken["summary"]) == set()
    assert broken["ok"] is False and broken["exit_code"] == 2 and broken["layers"] == []
    assert broken["method"] == "richardson" and broken["second_order"] is None
    assert broken["summary"]["error_enters_at"] is None and broken["array_library"] is None


def test_two_targets_each_import_their_own_neighbour_of_the_same_name(run_cli, tmp_path):
    """README, *Naming a target*: a file target can import its neighbours. Two targets in
    different folders, each with its own helper.py, must each get their own: the folder of
    the correct one holds FACTOR = 1 (d sin = cos, Abramowitz & Stegun 4.3.105), the other's
    a factor 2. Either order, the correct one agrees and the other disagrees."""
    target = ('import numpy as np\nfrom helper import FACTOR\n'
              'params = {"w": np.array([0.5, -1.0])}\n'
              'def forward(p, i): return float(np.sum(np.sin(p["w"])))\n'
              'def backward(p, i): return {"w": np.cos(p["w"]) * FACTOR}\n')
    for folder, factor in (("right", 1.0), ("wrong", 2.0)):
        (tmp_path / folder).mkdir()
        (tmp_path / folder / "helper.py").write_text(f"FACTOR = {factor}\n")
        (tmp_path / folder / "case.py").write_text(target)
    for order in (("right/case.py", "wrong/case.py"), ("wrong/case.py", "right/case.py")):
        result = run_cli("check", *order, "-q")
        lines = result.stdout.splitlines()
        assert result.exit_code == 1
        assert any(line.startswith("right/case.py: agrees") for line in lines), lines
        assert any(line.startswith("wrong/case.py: DISAGREES") for line in lines), lines


def test_two_params_flattening_to_one_name_are_refused(run_cli, write_target):
    """Protocol section 2: a nested name is the keys joined with '.', so a key 'a.b' beside
    the nesting a -> b names one tensor twice; that is bad input (exit 2, one sentence),
    not a wrong gradient."""
    write_target("""
        import numpy as np
        params = {"a.b": np.array([0.5]), "a": {"b": np.array([1.0])}}
        def forward(p, i): return float(np.sum(p["a.b"] ** 2) + np.sum(p["a"]["b"] ** 2))
        def backward(p, i): return {"a.b": 2 * p["a.b"], "a": {"b": 2 * p["a"]["b"]}}
    """)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    last = result.stderr.strip().splitlines()[-1]
    assert last.startswith("gradprobe: error: case.py: ") and "'a.b'" in last


# -- the report's keys, section by section of the protocol --------------------------------

SECTION_4_TOP = {"schema", "target", "ok", "threshold", "seed", "summary", "layers", "errors"}
SECTION_4_SUMMARY = {"tensors", "checked", "failed", "kinks", "evaluations", "seconds"}
SECTION_4_TENSOR = {"name", "layer", "kind", "shape", "dtype", "checked", "failed", "kinks",
                    "max_abs_error", "max_rel_error", "worst_index", "bad_indices", "status", "hint"}


def _tensors(report: dict) -> dict[str, dict]:
    return {t["name"]: t for layer in report["layers"] for t in layer["tensors"]}


def test_a_flat_report_has_the_keys_of_sections_4_6_and_7(run_cli, write_target):
    write_target(DENSE.replace("BUG", "+ 0.5"))
    result = run_cli("check", "case.py", "--json", "-")
    report = _json(result)
    assert result.exit_code == 1
    assert SECTION_4_TOP | {"array_library", "gradient_source", "second_order"} <= set(report)
    assert SECTION_4_SUMMARY <= set(report["summary"])
    assert report["summary"].get("error_enters_at") is None  # section 5: null when not a stack
    assert (report["array_library"], report["gradient_source"], report["second_order"]) == (
        "numpy", "backward", None)
    tensors = _tensors(report)
    for t in tensors.values():
        assert SECTION_4_TENSOR <= set(t) and "inherited_from" not in t and "baseline" not in t
    for layer in report["layers"]:
        assert {"name", "ok", "max_rel_error", "tensors", "own"} <= set(layer) and layer["own"] is None
    # the wrong tensor's numeric values are the closed form x^T (x W + b - y) (the
    # least-squares gradient, Petersen & Pedersen, The Matrix Cookbook, 2012, eq. 84 ff.)
    rng = np.random.default_rng(7)
    w, x, y = rng.normal(size=(3, 2)), rng.normal(size=(5, 3)), rng.normal(size=(5, 2))
    exact = x.T @ (x @ w - y)
    wrong = tensors["dense.W"]
    assert wrong["status"] == "fail" and sorted(wrong["bad_indices"]) == [
        [i, j] for i in range(3) for j in range(2)]
    for detail in wrong["details"]:
        i, j = detail["index"]
        assert detail["numeric"] == pytest.approx(exact[i, j], rel=1e-7, abs=1e-9)
    assert tensors["x"]["kind"] == "input" and tensors["x"]["layer"] == "inputs"
    assert tensors["dense.b"]["status"] == tensors["x"]["status"] == "pass"


STACK = """
import numpy as np, types
def _dense_f(p, x, inputs): return x @ p["W"] + p["b"]
def _dense_b(p, x, inputs, g): return {"W": x.T @ g, "b": g.sum(axis=0)}, g @ p["W"].T
def _tanh_f(p, x, inputs): return np.tanh(x)
def _tanh_b(p, x, inputs, g): return {}, g * (1 - np.tanh(x) ** 2) BUG
def _loss_f(p, x, inputs): return float(0.5 * np.sum((x - inputs["y"]) ** 2))
def _loss_b(p, x, inputs, g): return {}, g * (x - inputs["y"])
layers = [types.SimpleNamespace(name="hidden", forward=_dense_f, backward=_dense_b),
          types.SimpleNamespace(name="squash", forward=_tanh_f, backward=_tanh_b),
          types.SimpleNamespace(name="head", forward=_dense_f, backward=_dense_b),
          types.SimpleNamespace(name="loss", forward=_loss_f, backward=_loss_b)]
def setup():
    rng = np.random.default_rng(8)
    params = {"hidden": {"W": rng.normal(size=(3, 4)), "b": rng.normal(size=4) * 0.1},
              "head": {"W": rng.normal(size=(4, 2)), "b": np.zeros(2)}}
    return params, {"x": rng.normal(size=(6, 3)), "y": rng.normal(size=(6, 2))}
"""


def test_a_stack_whose_activation_drops_its_derivative_blames_that_layer(run_cli, write_target):
    """Section 5: tanh's backward passing grad_y through unchanged (d tanh = 1 - tanh^2,
    Abramowitz & Stegun 4.5.71, is missing): the error enters at `squash`; the layer before
    it fails end to end, inherited; the layer after it passes; a layer with no params still
    has its own verdict."""
    write_target(STACK.replace("BUG", "* 0 + g"))
    result = run_cli("check", "case.py", "--json", "-")
    report = _json(result)
    assert result.exit_code == 1
    assert report["summary"]["error_enters_at"] == ["squash"]
    layers = {layer["name"]: layer for layer in report["layers"]}
    assert layers["squash"]["tensors"] == [] and layers["squash"]["own"] == "fail"
    assert layers["squash"]["own_check"]["input_gradient_wrong"] is True
    assert layers["hidden"]["own"] == layers["head"]["own"] == layers["loss"]["own"] == "pass"
    tensors = _tensors(report)
    assert tensors["hidden.W"]["status"] == "fail" and tensors["hidden.W"]["inherited_from"] == "squash"
    assert tensors["head.W"]["status"] == "pass" and "inherited_from" not in tensors["head.W"]
    write_target(STACK.replace("BUG", ""))
    result = run_cli("check", "case.py", "--json", "-")
    assert result.exit_code == 0 and _json(result)["summary"]["error_enters_at"] == []


POISSON = """
import numpy as np
def setup():
    rng = np.random.default_rng(11)
    X = rng.normal(size=(9, 3)) * 0.5
    y = rng.poisson(2.0, size=9).astype(float)
    return {"rate": {"coef": np.array([0.2, -0.1, 0.3]), "base": np.array(0.4)}}, {"X": X, "y": y}
def _mu(p, i): return np.exp(i["X"] @ p["rate"]["coef"] + p["rate"]["base"])
def forward(p, i):
    eta = i["X"] @ p["rate"]["coef"] + p["rate"]["base"]
    return float(np.sum(np.exp(eta) - i["y"] * eta))
def backward(p, i):
    r = _mu(p, i) - i["y"]
    return {"rate": {"coef": i["X"].T @ r GRADBUG, "base": np.array(r.sum())}}
def hessian(p, i):
    mu = _mu(p, i); X = i["X"]
    H = np.empty((4, 4))
    H[:3, :3] = X.T @ (mu[:, None] * X)
    H[:3, 3] = X.T @ mu; H[3, :3] = X.T @ mu; H[3, 3] = mu.sum()
    HBUG
    return H
"""


def test_the_poisson_hessian_agrees_with_sympy_and_wrong_ones_say_where_the_error_enters(
        run_cli, write_target):
    """Section 7 on a Poisson regression: the target's Hessian is sympy's (checked here);
    its diagonal doubled fails at the Hessian; a gradient with an extra 0.1 w and the Hessian
    of that wrong gradient fails with the error entering at the gradient."""
    import sympy as sp

    namespace: dict = {}
    exec(POISSON.replace("GRADBUG", "").replace("HBUG", ""), namespace)
    params, inputs = namespace["setup"]()
    X, y = inputs["X"], inputs["y"]
    c = sp.symbols("c0:3")
    b = sp.Symbol("b")
    etas = [sum(float(X[k, j]) * c[j] for j in range(3)) + b for k in range(9)]
    loss = sum(sp.exp(e) - float(y[k]) * e for k, e in enumerate(etas))
    exact = np.array(sp.lambdify((*c, b), sp.hessian(loss, (*c, b)), "numpy")(0.2, -0.1, 0.3, 0.4))
    assert np.allclose(namespace["hessian"](params, inputs), exact, rtol=1e-12)

    cases = {("", ""): (0, "pass", None),
             ("", "H[np.diag_indices(4)] *= 2"): (1, "fail", "hessian"),
             ("+ 0.1 * p['rate']['coef']", "H[np.diag_indices(3)] += 0.1"): (1, "fail", "gradient")}
    for (gradbug, hbug), (code, status, enters) in cases.items():
        write_target(POISSON.replace("GRADBUG", gradbug).replace("HBUG", hbug))
        result = run_cli("check", "case.py", "--json", "-")
        second = _json(result)["second_order"]
        assert result.exit_code == code, (gradbug, hbug)
        assert (second["form"], second["status"], second["error_enters_at"]) == ("hessian", status, enters)
        assert {(block["rows"], block["cols"]) for block in second["blocks"]} == {
            (r, s) for r in ("rate.coef", "rate.base") for s in ("rate.coef", "rate.base")}
    result = run_cli("check", "case.py", "--second-order", "off", "--json", "-")
    assert result.exit_code == 1 and _json(result)["second_order"] is None


def test_kinks_a_step_away_and_a_tied_max_are_not_bugs_but_errors_beside_them_are(
        run_cli, write_target):
    """Absolute residuals 1e-8 .. 2e-5 from zero (d|r|/dr = sign r off 0) and a max tied
    between two elements with the gradient shared between the tied ones (a subgradient):
    both correct (exit 0); the same with a 5% error, or with weight on an element that is
    not the max, fail (exit 1). Subgradients of |.| and max: common practice."""
    near = """
        import numpy as np
        def setup():
            rng = np.random.default_rng(21)
            x = rng.normal(size=(12, 3)); w = np.array([0.4, -0.3, 0.8])
            off = np.array([1e-8, -3e-8, 1e-7, -5e-7, 1e-6, -2e-6, 5e-6, -1e-5, 2e-5, 0.3, -0.5, 1.0])
            return {"w": w}, {"x": x, "y": x @ w - off}
        def forward(p, i): return float(np.sum(np.abs(i["x"] @ p["w"] - i["y"])))
        def backward(p, i): return {"w": i["x"].T @ np.sign(i["x"] @ p["w"] - i["y"]) FACTOR}
    """
    tie = """
        import numpy as np
        params = {"w": np.array([1.0, 1.0, 0.2])}
        def forward(p, i): return float(np.max(p["w"]))
        def backward(p, i):
            m = (p["w"] == p["w"].max()).astype(float)
            return {"w": m / m.sum() EXTRA}
    """
    for source, right, wrong in ((near, "", "* 1.05"), (tie, "", "+ np.array([0, 0, 1.0])")):
        for bug, code in ((right, 0), (wrong, 1)):
            write_target(source.replace("FACTOR", bug).replace("EXTRA", bug))
            result = run_cli("check", "case.py", "-q")
            assert result.exit_code == code, result.stdout


def test_in_pytest_a_forward_that_raises_is_not_told_to_add_a_command_line_option(pytester):
    """README, *From pytest*: a check that cannot run fails the test with its one sentence
    and the traceback already shows the user's frames; the command line's advice to add
    --traceback (an option pytest does not have) is not given there."""
    pytester.makepyfile("""
        import numpy as np

        def test_sensor(grad_probe):
            grad_probe(lambda p, i: 1 / 0, lambda p, i: {"w": 2 * p["w"]}, {"w": np.ones(3)})
        """)
    result = pytester.runpytest("-p", "no:cacheprovider", "-p", "no:hypothesispytest", "-q")
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines(["*forward raised ZeroDivisionError: division by zero; the "
                                 "traceback above shows where in your code*"])
    assert "--traceback" not in result.stdout.str()


def test_a_param_and_an_input_of_one_name_are_refused_with_what_to_do(run_cli, write_target):
    """Every exit 2 says what is wrong and what to do (README, *Exit codes*)."""
    write_target("""
        import numpy as np
        params = {"x": np.array([0.5, 1.0])}
        inputs = {"x": np.array([2.0, 3.0])}
        def forward(p, i): return float(np.sum(p["x"] ** 2 * i["x"]))
        def backward(p, i): return {"x": 2 * p["x"] * i["x"]}
    """)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert result.stderr.strip().splitlines()[-1] == (
        "gradprobe: error: case.py: a param and an input share the name 'x'; rename one of "
        "them, so that each tensor has a name of its own.")
