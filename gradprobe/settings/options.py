"""The settings of one check, each declared once.

A setting is a field of :class:`CheckOptions` (how to check) or :class:`ReportFiles` (where
reports go) whose metadata carries its help, its command-line flag and whether the pytest
fixture takes it. The CLI's options, the ``[tool.gradprobe]`` keys and their types, the
``--settings-in-force`` table and the help texts are all derived from :data:`SETTINGS`.
"""

from __future__ import annotations

import fnmatch
import math
import numbers
import os
import typing
from collections.abc import Mapping
from dataclasses import MISSING, Field, field, fields, replace
from typing import Any

from ..common.classes import dataclass
from ..common.errors import UsageProblem

METHODS = ("central", "richardson", "complex")
INCONCLUSIVE_POLICIES = ("allow", "fail")
SWITCH = ("on", "off")

def default_threshold(dtype: Any) -> float:
    """The default threshold for a dtype (or its name): derived from its unit roundoff, see
    engine/roundoff.py (imported here, not above: the command line starts without numpy)."""
    from ..common.roundoff import default_threshold as from_roundoff

    return from_roundoff(getattr(dtype, "name", dtype))


def setting(
    what: str, default: Any, help: str, *, flag: str | None = None, short: str | None = None,
    metavar: str | None = None, choices: tuple[str, ...] | None = None,
    unset: str | None = None, fixture: bool = False,
) -> Any:
    """A dataclass field that is a user-facing setting (see :class:`Setting`)."""
    meta = {"what": what, "help": help, "flag": flag, "short": short, "metavar": metavar, "choices": choices,
            "unset": unset, "fixture": fixture}
    return field(default=default, metadata={"setting": meta})


@dataclass(frozen=True)
class CheckOptions:
    """How to check. ``None`` means "decide from the target" (threshold, sample, directions)."""

    threshold: float | None = setting(
        "relative-error threshold", None, "Relative error above which a coordinate fails.", flag="fail-above", metavar="REL",
        unset="1e-6; 2*sqrt(u) for code judged in its own narrower type (float32 4.9e-4, float16 0.044, bfloat16 0.12)", fixture=True)
    seed: int = setting(
        "seed for every random draw", 0, "Seed for every random draw (grad_output, samples, directions); 0 or more.",
        metavar="N", fixture=True)
    method: str = setting(
        "central, richardson or complex", "central", "Numeric derivative: central differences, Richardson extrapolation, or the "
        "complex step.", choices=METHODS, fixture=True)
    sample: int | None = setting(
        "coordinates per tensor", None, "Check at most N coordinates per tensor, stratified over every axis plus the "
        "largest gradients (0: directional checks only).", metavar="N",
        unset="every coordinate when the target has at most 20000; in a larger target every "
        "coordinate of tensors up to 48 elements and 24 of larger ones")
    directions: int | None = setting(
        "random directions per tensor", None, "Random-direction checks per tensor, 2 evaluations each plus extrapolation.",
        metavar="K", unset="2 for the tensors that are sampled, else 0")
    jobs: int = setting("worker processes", 1, "Evaluate perturbations in N worker processes.", short="-j", metavar="N")
    recheck: bool = setting(
        "re-check failing coordinates by extrapolation", True, "Re-check coordinates that fail the central difference by extrapolation before "
        "failing them.")
    inconclusive: str = setting(
        "allow or fail", "allow", "What an inconclusive tensor does to the run: 'allow' reports it and passes, "
        "'fail' fails the run (exit 1).", choices=INCONCLUSIVE_POLICIES, fixture=True)
    only: str | None = setting(
        "tensors to check", None, "Check only the tensors whose names match one of these "
        "comma-separated patterns ('hidden.*,out.W'; * and ? match as in file names).",
        metavar="PATTERNS", unset="every tensor")
    skip: str | None = setting(
        "tensors to leave out", None, "Leave out the tensors whose names match one of these "
        "comma-separated patterns (after --only).", metavar="PATTERNS", unset="none")
    baseline: str | None = setting(
        "path of an earlier JSON report", None, "Compare each tensor with the JSON report at PATH, written earlier by "
        "--json: a tensor whose worst relative error grew more than the growth factor while both "
        "pass (regressed), or whose status got worse, fails the run (exit 1).", metavar="PATH",
        unset="no comparison", fixture=True)
    baseline_growth: float = setting(
        "growth factor that counts as regressed", 10.0, "How many times its worst relative error may grow "
        "since the baseline before a passing tensor counts as regressed (above the noise floor).",
        flag="baseline-growth", metavar="FACTOR", fixture=True)
    second_order: str = setting(
        "on or off", "on", "Check the target's hand-written Hessian or Hessian-vector product (hvp, "
        "hessian) after the gradient: 'off' skips it.", flag="second-order", choices=SWITCH,
        fixture=True)
    # Internal plan sizes (not settings): see engine/tensor_check.py.
    sweep_total: int = 20_000  # a target with at most this many coordinates is swept in full
    sweep_limit: int = 48  # in a larger target, tensors up to this size still are
    default_sample: int = 24  # coordinates checked in a tensor that is not swept
    default_directions: int = 2
    # Coordinates an earlier run checked, to be checked again (tensor name -> (shape, flat
    # indices)), so a comparison with that run is made on the same coordinates.
    also_check: Mapping[str, tuple[tuple[int, ...], tuple[int, ...]]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.threshold is not None and not (
            isinstance(self.threshold, numbers.Real) and self.threshold > 0 and math.isfinite(self.threshold)
        ):
            raise UsageProblem(f"the threshold must be a positive number, not {self.threshold}",
                               value=self.threshold)
        if isinstance(self.seed, bool) or not isinstance(self.seed, numbers.Integral) or self.seed < 0:
            raise UsageProblem(f"the seed must be a whole number 0 or more, not {self.seed!r}",
                               value=self.seed)
        if self.method not in METHODS:
            raise UsageProblem(f"unknown method {self.method!r}; choose one of {', '.join(METHODS)}",
                               value=self.method)
        if self.inconclusive not in INCONCLUSIVE_POLICIES:
            raise UsageProblem(
                f"inconclusive must be one of {', '.join(INCONCLUSIVE_POLICIES)}, not "
                f"{self.inconclusive!r}", value=self.inconclusive)
        if self.second_order not in SWITCH:
            raise UsageProblem(f"second_order must be on or off, not {self.second_order!r}",
                               value=self.second_order)
        for name in ("sample", "directions"):
            value = getattr(self, name)
            if value is not None and value < 0:
                raise UsageProblem(f"{name} must be 0 or more, not {value}", value=value)
        if self.sample == 0 and self.directions == 0:
            raise UsageProblem("sample 0 with directions 0 would check nothing")
        for name in ("only", "skip"):
            value = getattr(self, name)
            if value is not None and (not isinstance(value, str) or not _patterns(value)):
                raise UsageProblem(f"{name} takes comma-separated name patterns such as "
                                   f"'hidden.*,out.W', not {value!r}", value=value)
        if not (isinstance(self.baseline_growth, numbers.Real) and not isinstance(self.baseline_growth, bool)
                and self.baseline_growth >= 1 and math.isfinite(self.baseline_growth)):
            raise UsageProblem(f"the baseline growth factor must be a number 1 or more, not "
                               f"{self.baseline_growth!r}", value=self.baseline_growth)
        if self.baseline is not None and not isinstance(self.baseline, (str, os.PathLike)):
            raise UsageProblem(f"the baseline must be the path of a JSON report, not {self.baseline!r}",
                               value=self.baseline)
        if self.jobs < 1:
            raise UsageProblem(f"jobs must be 1 or more, not {self.jobs}", value=self.jobs)

    def with_values(self, **values: Any) -> CheckOptions:
        """A copy with the given settings replaced; unknown names are a UsageProblem."""
        known = [s.name for s in SETTINGS if s.owner is CheckOptions]
        unknown = sorted(set(values) - set(known))
        if unknown:
            raise UsageProblem(f"unknown option {unknown[0]!r}; known: {', '.join(sorted(known))}",
                               value=unknown[0])
        return replace(self, **values)

    @property
    def inconclusive_fails(self) -> bool:
        return self.inconclusive == "fail"

    @property
    def resolved_threshold(self) -> float:
        """The threshold once the check has resolved it for the type it judges in."""
        if self.threshold is None:
            raise ValueError("the threshold is resolved before any tensor is checked")
        return self.threshold

    def selects(self, name: str) -> bool:
        """Whether tensor ``name`` is checked under ``only`` and ``skip``."""
        wanted = _patterns(self.only)
        if wanted and not any(fnmatch.fnmatchcase(name, p) for p in wanted):
            return False
        return not any(fnmatch.fnmatchcase(name, p) for p in _patterns(self.skip))


def _patterns(text: str | None) -> list[str]:
    return [p.strip() for p in (text or "").split(",") if p.strip()]


@dataclass(frozen=True)
class ReportFiles:
    """Where the machine-readable reports go (``None``: nowhere)."""

    json: str | None = setting(
        "path of the JSON report", None, "Write the JSON report to PATH ('-' for standard output, then nothing else goes "
        "there).", metavar="PATH")
    junit: str | None = setting(
        "path of the JUnit XML report", None, "Write a JUnit XML report to PATH: a testsuite per target, a testcase per tensor "
        "(an inconclusive tensor is a skipped testcase carrying its reason).", metavar="PATH")
    html: str | None = setting(
        "path of the HTML report", None, "Write one self-contained HTML page for the whole run to PATH: the verdict, "
        "the settings, a table per target and layer, and a map of each failing tensor.", metavar="PATH")


@dataclass(frozen=True)
class Setting:
    """One user-facing setting, derived from its field."""

    name: str
    owner: type
    types: tuple[type, ...]  # what a value may be (besides None when default is None)
    default: Any
    what: str  # a few words, for config errors and the settings table
    help: str
    flag: str  # the long command-line flag without dashes
    short: str | None
    metavar: str | None
    choices: tuple[str, ...] | None
    unset: str | None  # what None means, for help texts
    fixture: bool  # also a pytest option / ini key for the grad_probe fixture

    @property
    def config_key(self) -> str:
        return self.name



def _types(hint: Any) -> tuple[type, ...]:
    args = [a for a in typing.get_args(hint) if a is not type(None)] or [hint]
    kind = args[0]
    return (float, int) if kind is float else (kind,)


def _settings(owner: type) -> list[Setting]:
    hints = typing.get_type_hints(owner)
    out = []
    for f in fields(owner):
        meta = f.metadata.get("setting")
        if meta is None:
            continue
        assert isinstance(f, Field) and f.default is not MISSING
        out.append(Setting(
            name=f.name, owner=owner, types=_types(hints[f.name]), default=f.default,
            what=meta["what"], help=meta["help"], flag=meta["flag"] or f.name, short=meta["short"],
            metavar=meta["metavar"], choices=meta["choices"], unset=meta["unset"],
            fixture=meta["fixture"]))
    return out


SETTINGS: tuple[Setting, ...] = (*_settings(CheckOptions), *_settings(ReportFiles))
SETTING = {s.name: s for s in SETTINGS}


def split_values(values: dict[str, Any]) -> tuple[CheckOptions, ReportFiles]:
    """Effective setting values (by name) as the two dataclasses."""
    check = {s.name: values[s.name] for s in SETTINGS if s.owner is CheckOptions and s.name in values}
    files = {s.name: values[s.name] for s in SETTINGS if s.owner is ReportFiles and s.name in values}
    return CheckOptions(**check), ReportFiles(**files)
