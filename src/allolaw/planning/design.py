"""A study plan in plain words: the assumed truth, the candidate designs and the question.

A plan is one entry of the ``plans:`` section of a batch config (keys described, with
defaults, under ``plans`` in ``src/allolaw/schemas/config.schema.yaml``). :func:`read_plan`
checks it and returns a :class:`Plan`; every candidate design is one combination of the
values listed under ``designs:`` (species count, number of taxa, size range, size error SD,
replicates).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import asdict, dataclass, field
from typing import Any

from allolaw.errors import UserError

__all__ = ["AXES", "Design", "Plan", "Question", "Truth", "read_plan"]

#: The design axes, in the order of the designs table.
AXES = ("species", "taxa", "size_range", "size_error_sd", "replicates")

_TRUTH_KEYS = {"exponent", "intercept_sd", "exponent_sd", "scatter_sd", "curvature",
               "trait_error_sd", "from_fit"}
_QUESTION_KEYS = {"about", "exponents", "other_weight", "interval_halfwidth", "target", "goal"}
_PLAN_KEYS = {"title", "truth", "designs", "question", "analysis", "simulations", "seed",
              "chunks", "check_with_mcmc"}
_ANALYSIS_KEYS = {"exponent_prior", "intercept_sd_scale", "exponent_sd_scale",
                  "scatter_sd_scale", "quadrature_points", "curvature", "curvature_prior"}


@dataclass(frozen=True)
class Truth:
    """The assumed truth: explicit values, or a fitted posterior used as the design prior.

    With ``from_fit`` set, each simulated table takes its exponent, taxon SDs, scatter and
    curvature from one posterior draw of that file (assurance); the explicit values are
    then not used.
    """

    exponent: float = 0.75
    intercept_sd: float = 0.3
    exponent_sd: float = 0.05
    scatter_sd: float = 0.2
    curvature: float = 0.0
    trait_error_sd: float = 0.0
    from_fit: str = ""


@dataclass(frozen=True)
class Question:
    """Which named exponents to tell apart (or whether the law curves), and how sure.

    ``about = "exponent"``: the named values are told apart. ``about = "curvature"``: the
    answer is the sign of the curvature (curving up, c > 0, or down), reached when P(c > 0)
    or P(c < 0) is at least ``target``; with a straight truth (c = 0) every such answer is a
    confident wrong one.
    """

    exponents: tuple[tuple[str, float, float], ...]  # (name, value, prior weight)
    about: str = "exponent"
    other_weight: float = 1.0
    interval_halfwidth: float = 0.03
    target: float = 0.9  # posterior probability the answer must reach
    goal: float = 0.8  # assurance a design must reach to count as large enough


@dataclass(frozen=True)
class Design:
    """One candidate design (one row of the designs table)."""

    species: int
    taxa: int
    size_range: float  # natural-log units spanned by the middle 95 % of true sizes
    size_error_sd: float  # SD of one measurement of log size
    replicates: int  # measurements per species (size and trait)

    @property
    def species_error_sd(self) -> float:
        """SD of a species' mean log size: one measurement's SD over sqrt(replicates)."""
        return self.size_error_sd / math.sqrt(self.replicates)

    def label(self) -> str:
        """Short plain label, e.g. ``40 species in 8 taxa, range 4, size error 0.1 x 2``."""
        err = (f", size error {self.size_error_sd:g} × {self.replicates}"
               if self.size_error_sd > 0 else "")
        return (f"{self.species} species in {self.taxa} taxa, size range "
                f"{self.size_range:g}{err}")


@dataclass(frozen=True)
class Analysis:
    """Priors of the fast analysis; the defaults are those of the model specs in models/."""

    exponent_prior: tuple[float, float] = (1.0, 1.0)  # normal mean, sd (inf: flat)
    intercept_prior_sd: float = 5.0
    intercept_sd_scale: float = 1.0  # half-normal scales of the taxon SDs
    exponent_sd_scale: float = 0.25
    scatter_sd_scale: float = 1.0  # half-normal scale of sigma; 0: p(sigma) ∝ 1/sigma
    scatter_fixed: float = 0.0  # > 0: sigma known
    quadrature_points: int = 3
    curvature: bool = False  # fit a shared curvature term
    curvature_prior: tuple[float, float] = (0.0, 0.25)


@dataclass(frozen=True)
class Plan:
    """A checked plan: name, truth, designs, question, analysis settings, simulation size."""

    name: str
    title: str
    truth: Truth
    designs: tuple[Design, ...]
    question: Question
    analysis: Analysis = field(default_factory=Analysis)
    simulations: int = 500
    seed: int = 1
    chunks: int = 1
    check_with_mcmc: int = 0

    def to_dict(self) -> dict[str, Any]:
        """Plain data for JSON output."""
        return asdict(self)


def read_plan(config: dict[str, Any], name: str, *, source: str = "config") -> Plan:
    """Check the plan ``name`` of ``config["plans"]`` and return it.

    Raises
    ------
    UserError
        Unknown plan or key, or a value out of range; the message names the file and key.
    """
    plans = config.get("plans") or {}
    if name not in plans:
        msg = f"{source}: key 'plans': no plan named {name!r} (plans: {', '.join(plans) or 'none'})"
        raise UserError(msg)
    raw = plans[name] or {}
    where = f"{source}: plans.{name}"
    _known(raw, _PLAN_KEYS, where)
    truth = _read_truth(raw.get("truth") or {}, f"{where}.truth")
    question = _read_question(raw.get("question") or {}, config.get("hypotheses") or {},
                              f"{where}.question")
    designs = _read_designs(raw.get("designs") or {}, f"{where}.designs")
    analysis = _read_analysis(raw.get("analysis") or {}, f"{where}.analysis",
                              curvature=question.about == "curvature")
    sims = _positive_int(raw.get("simulations", 500), f"{where}.simulations")
    chunks = _positive_int(raw.get("chunks", 1), f"{where}.chunks")
    check = int(raw.get("check_with_mcmc", 0))
    return Plan(name=name, title=str(raw.get("title") or name), truth=truth, designs=designs,
                question=question, analysis=analysis, simulations=sims,
                seed=int(raw.get("seed", 1)), chunks=chunks, check_with_mcmc=check)


def _read_truth(raw: dict[str, Any], where: str) -> Truth:
    _known(raw, _TRUTH_KEYS, where)
    values = {k: float(v) for k, v in raw.items() if k != "from_fit"}
    for key in ("intercept_sd", "exponent_sd", "scatter_sd", "trait_error_sd"):
        if values.get(key, 0.0) < 0:
            msg = f"{where}.{key}: value {values[key]!r} must be ≥ 0"
            raise UserError(msg)
    return Truth(**values, from_fit=str(raw.get("from_fit", "")))


def _read_question(raw: dict[str, Any], hypotheses: dict[str, Any], where: str) -> Question:
    _known(raw, _QUESTION_KEYS, where)
    about = str(raw.get("about", "exponent"))
    if about not in ("exponent", "curvature"):
        msg = f"{where}.about: value {about!r}: use exponent or curvature"
        raise UserError(msg)
    listed = raw.get("exponents", hypotheses.get("exponents"))
    if not listed and about == "curvature":
        listed = []
    elif not listed:
        msg = f"{where}.exponents: list the named exponents to tell apart (name, value, weight)"
        raise UserError(msg)
    named = tuple((str(h["name"]), float(h["value"]), float(h.get("weight", 1.0)))
                  for h in listed)
    q = Question(
        exponents=named, about=about,
        other_weight=float(raw.get("other_weight", hypotheses.get("other_weight", 1.0))),
        interval_halfwidth=float(raw.get("interval_halfwidth",
                                         hypotheses.get("interval_halfwidth", 0.03))),
        target=float(raw.get("target", 0.9)),
        goal=float(raw.get("goal", 0.8)),
    )
    for key in ("target", "goal"):
        value = getattr(q, key)
        if not 0 < value < 1:
            msg = f"{where}.{key}: value {value!r} must lie between 0 and 1"
            raise UserError(msg)
    return q


def _read_designs(raw: dict[str, Any], where: str) -> tuple[Design, ...]:
    _known(raw, set(AXES), where)
    defaults = {"species": [40], "taxa": [8], "size_range": [4.0], "size_error_sd": [0.0],
                "replicates": [1]}
    axes = {}
    for axis in AXES:
        values = raw.get(axis, defaults[axis])
        values = values if isinstance(values, list) else [values]
        kind = int if axis in ("species", "taxa", "replicates") else float
        axes[axis] = [kind(v) for v in values]
        for v in axes[axis]:
            low = 0.0 if axis == "size_error_sd" else 1e-12
            if v < low:
                msg = f"{where}.{axis}: value {v!r} out of range"
                raise UserError(msg)
    designs = tuple(Design(*combo) for combo in itertools.product(*axes.values()))
    for d in designs:
        if d.taxa > d.species or d.species < 3 + (2 if d.taxa > 1 else 0):
            msg = (f"{where}: design with {d.species} species and {d.taxa} taxa: need at "
                   "least 3 species and no more taxa than species")
            raise UserError(msg)
    return designs


def _read_analysis(raw: dict[str, Any], where: str, *, curvature: bool) -> Analysis:
    _known(raw, _ANALYSIS_KEYS, where)
    prior = raw.get("exponent_prior", {"mean": 1.0, "sd": 1.0})
    c_prior = raw.get("curvature_prior", {"mean": 0.0, "sd": 0.25})
    return Analysis(
        curvature=bool(raw.get("curvature", False)) or curvature,
        curvature_prior=(float(c_prior["mean"]), float(c_prior["sd"])),
        exponent_prior=(float(prior["mean"]), float(prior["sd"])),
        intercept_sd_scale=float(raw.get("intercept_sd_scale", 1.0)),
        exponent_sd_scale=float(raw.get("exponent_sd_scale", 0.25)),
        scatter_sd_scale=float(raw.get("scatter_sd_scale", 1.0)),
        quadrature_points=_positive_int(raw.get("quadrature_points", 3),
                                        f"{where}.quadrature_points"),
    )


def _known(raw: dict[str, Any], allowed: set[str], where: str) -> None:
    if not isinstance(raw, dict):
        msg = f"{where}: expected a mapping, got {raw!r}"
        raise UserError(msg)
    unknown = sorted(set(raw) - allowed)
    if unknown:
        msg = f"{where}: unknown key {unknown[0]!r} (known: {', '.join(sorted(allowed))})"
        raise UserError(msg)


def _positive_int(value: Any, where: str) -> int:
    if int(value) < 1:
        msg = f"{where}: value {value!r} must be a whole number ≥ 1"
        raise UserError(msg)
    return int(value)
