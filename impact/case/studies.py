"""Reading the candidate studies of a case file (``[[studies]]``) and how its objectives are valued in
money or a common unit (``[outcome_values]``), for the expected value of sample information.

A study measures one of three things, through one of the observation models monitoring data use
(:mod:`impact.ensemble.observe`):

* ``measures = "species"``: ``samples`` counts (or index values) of a species' abundance today, e.g.
  repeat transects of one season, each with expected count ``detection × scale × N`` (Poisson or
  negative binomial) or median index ``scale × N`` (lognormal);
* ``measures = "parameter"``: ``samples`` measurements of one uncertain parameter, with expected
  count ``detection × scale × value`` or median ``scale × value``;
* ``measures = "group"``: the same for every parameter of a declared ``[[parameter_groups]]`` entry,
  ``samples`` measurements of each.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from impact.case.priors import DISTRIBUTIONS, Fixed, Prior, prior_problems
from impact.case.reader import Reader, Table
from impact.case.types import ParameterGroup, Quantity, Species

STUDY_MEASURES = ("species", "parameter", "group")
STUDY_ERRORS = ("poisson", "negative-binomial", "lognormal")
DEFAULT_COST_UNIT = "cost units"


@dataclass(frozen=True)
class Study:
    """A candidate study: what it measures, through which observation model, how many samples, at what cost.

    Attributes
    ----------
    measures : str
        ``species``, ``parameter`` or ``group``.
    target : str
        The species, parameter or parameter-group name.
    parameters : tuple of str
        The uncertain parameters it measures directly (empty for a species study).
    error : str
        ``poisson``, ``negative-binomial`` or ``lognormal``.
    samples : int
        Counts or measurements taken (of each parameter, for a group).
    detection, scale, dispersion, log_sd : Quantity
        The observation model's terms, as for monitoring series (dispersion only for the negative
        binomial, log_sd only for the lognormal).
    cost : float
        What the study costs, in ``cost_unit``.
    """

    name: str
    measures: str
    target: str
    parameters: tuple[str, ...]
    error: str
    samples: int
    detection: Quantity
    scale: Quantity
    dispersion: Quantity | None
    log_sd: Quantity | None
    cost: float
    cost_unit: str
    description: str = ""


@dataclass(frozen=True)
class OutcomeValues:
    """What a certain good outcome of each valued objective is worth, in ``unit`` (the studies' cost unit)."""

    unit: str
    values: tuple[tuple[str, float], ...]
    source: str = ""

    def of(self, objective: str) -> float | None:
        return dict(self.values).get(objective)


def read_study(r: Reader, i: int, raw: Any, species: tuple[Species, ...], uncertain: set[str],
               groups: tuple[ParameterGroup, ...]) -> Study:
    """One ``[[studies]]`` entry (see the module doc)."""
    t = Table(r, raw, f"studies[{i}]")
    name = t.get("name", kind="str")
    t.path = base = f"studies.{name}"
    measures = r.choice(f"{base}.measures", t.get("measures", kind="str"), STUDY_MEASURES)
    if measures == "species":
        names = [s.name for s in species]
        target = r.choice(f"{base}.species", t.get("species", kind="str"), names)
        if not next(s for s in species if s.name == target).present:
            r.fail(f"{base}.species", f"{target!r} is absent today; a survey of it would count nothing")
        params: tuple[str, ...] = ()
    elif measures == "parameter":
        target = t.get("parameter", kind="str")
        if target not in uncertain:
            r.fail(f"{base}.parameter", f"{target!r} is not an uncertain parameter; uncertain: "
                                        f"{', '.join(sorted(uncertain)) or 'none'}")
        params = (target,)
    else:
        by_name = {g.name: g for g in groups}
        target = t.get("group", kind="str")
        if target not in by_name:
            r.fail(f"{base}.group", f"{target!r} is not a declared parameter group; declared: "
                                    f"{', '.join(sorted(by_name)) or 'none (add [[parameter_groups]])'}")
        params = by_name[target].parameters
    error = r.choice(f"{base}.error", t.get("error", kind="str"), STUDY_ERRORS)
    for p in params:
        # the measured value is a mean count or a median index: it must not be negative (positive for a log)
        r.references.append((f"{base}.{'parameter' if measures == 'parameter' else 'group'}", p, 0.0, None,
                             error == "lognormal"))
    samples = t.number("samples", low=1, high=1_000_000, integer=True)
    detection = t.quantity("detection", 1.0, low=0, low_open=True, high=1) if error != "lognormal" else 1.0
    scale = t.quantity("scale", 1.0, low=0, low_open=True)
    dispersion = t.quantity("dispersion", low=0, low_open=True) if error == "negative-binomial" else None
    log_sd = t.quantity("log_sd", low=0, low_open=True) if error == "lognormal" else None
    cost = t.number("cost", low=0)
    cost_unit = t.get("cost_unit", DEFAULT_COST_UNIT, "str")
    desc = t.get("description", "", "str")
    t.done()
    return Study(name, measures, target, params, error, int(samples), detection, scale, dispersion, log_sd,
                 float(cost), cost_unit, desc)


def read_outcome_values(r: Reader, raw: Any, objectives: set[str], studies: tuple[Study, ...]) -> OutcomeValues | None:
    """``[outcome_values]``: ``unit`` and ``objectives = {name = value of a certain good outcome}`` (absent: None)."""
    if raw is None:
        return None
    t = Table(r, raw, "outcome_values")
    unit = t.get("unit", kind="str")
    per = t.get("objectives", kind="any")
    if not isinstance(per, dict) or not per:
        r.fail("outcome_values.objectives", "must be a table {objective name = value of a certain good outcome}")
    values = []
    for k, v in per.items():
        f = f"outcome_values.objectives.{k}"
        if k not in objectives:
            r.fail(f, f"unknown objective {k!r}; declared objectives: {', '.join(sorted(objectives)) or 'none'}")
        v = r.check_type(f, v, "number")
        r.check_range(f, v, 0, None, False)
        values.append((k, float(v)))
    source = t.get("source", "", "str")
    t.done()
    for s in studies:
        if s.cost_unit != unit:
            r.fail(f"studies.{s.name}.cost_unit", f"{s.cost_unit!r} differs from outcome_values.unit {unit!r}; "
                                                  "costs and values must be in one unit (no conversion is made)")
    return OutcomeValues(unit, tuple(values), source)


@dataclass(frozen=True)
class Weighing:
    """Option costs, swing weights on the objectives and a budget (``[weighing]``).

    Attributes
    ----------
    option_costs : tuple of (option, prior)
        Every option's cost in ``cost_unit`` (doing nothing costs 0): a known cost (:class:`Fixed`) or a
        prior of the parameters' syntax, drawn per member (:func:`impact.ensemble.sample.cost_uniforms`).
    weights : tuple of (objective, low, high)
        Each objective's weight as a share of the whole (weights sum to 1): ``low == high`` for a declared
        weight, a range for an uncertain one, (0, 1) for ``"unknown"``. Objectives not named weigh 0.
    budget : float or None
        What may be spent on options together, in ``cost_unit`` (None: no budget declared).
    """

    cost_unit: str
    option_costs: tuple[tuple[str, Prior], ...]
    weights: tuple[tuple[str, float, float], ...]
    source: str = ""
    budget: float | None = None

    @property
    def uncertain(self) -> bool:
        return any(lo < hi for _, lo, hi in self.weights)

    @property
    def uncertain_costs(self) -> bool:
        return any(not isinstance(c, Fixed) for _, c in self.option_costs)


def _cost(r: Reader, f: str, v: Any) -> Prior:
    """A cost: a number >= 0, or a prior table ``{distribution = ..., ...}`` whose support is >= 0."""
    if not isinstance(v, dict):
        v = r.check_type(f, v, "number")
        r.check_range(f, v, 0, None, False)
        return Fixed(float(v))
    t = Table(r, v, f)
    dist = t.get("distribution", kind="str")
    r.choice(f"{f}.distribution", dist, tuple(DISTRIBUTIONS))
    cls, required, optional = DISTRIBUTIONS[dist]
    args = {k: t.number(k) for k in required}
    for k, d in optional.items():
        args[k] = t.number(k, d)
    t.done()
    prior = cls(**args)
    for g, msg in prior_problems(prior):
        r.fail(f"{f}.{g}", msg)
    if prior.support()[0] < 0:
        r.fail(f, f"a cost cannot be negative: this prior reaches {prior.support()[0]:g}")
    return prior


def _weight(r: Reader, f: str, v: Any) -> tuple[float, float]:
    if v == "unknown":
        return 0.0, 1.0
    if isinstance(v, list):
        if len(v) != 2:
            r.fail(f, "a range of weights is a list of two numbers [low, high]")
        lo, hi = (r.check_type(f, x, "number") for x in v)
        if not 0 <= lo <= hi <= 1:
            r.fail(f, f"a range [low, high] needs 0 <= low <= high <= 1, got [{lo:g}, {hi:g}]")
        return lo, hi
    if isinstance(v, str):
        r.fail(f, f"must be a number in [0, 1], a range [low, high] or \"unknown\", got {v!r}")
    w = r.check_type(f, v, "number")
    r.check_range(f, w, 0, 1, False)
    return w, w


def read_weighing(r: Reader, raw: Any, options: set[str], objectives: set[str]) -> Weighing | None:
    """``[weighing]``: ``cost_unit``, ``option_costs = {option = cost or prior}``, ``budget``, ``weights = {objective = w, [lo, hi]
    or "unknown"}`` (shares of the whole; absent: None)."""
    if raw is None:
        return None
    t = Table(r, raw, "weighing")
    unit = t.get("cost_unit", DEFAULT_COST_UNIT, "str")
    costs = t.get("option_costs", {}, "any")
    if not isinstance(costs, dict):
        r.fail("weighing.option_costs", "must be a table {option name = cost}")
    for k in costs:
        if k not in options:
            r.fail(f"weighing.option_costs.{k}", f"unknown option {k!r}; declared options: {', '.join(sorted(options))}")
    if costs and set(costs) != options:
        missing = sorted(options - set(costs))
        r.fail("weighing.option_costs", f"give every option a cost (missing: {', '.join(missing)})")
    option_costs = [(k, _cost(r, f"weighing.option_costs.{k}", v)) for k, v in costs.items()]
    raw_w = t.get("weights", {}, "any")
    if not isinstance(raw_w, dict):
        r.fail("weighing.weights", "must be a table {objective name = weight, [low, high] or \"unknown\"}")
    weights = []
    for k, v in raw_w.items():
        if k not in objectives:
            r.fail(f"weighing.weights.{k}", f"unknown objective {k!r}; declared objectives: "
                                           f"{', '.join(sorted(objectives)) or 'none'}")
        weights.append((k, *_weight(r, f"weighing.weights.{k}", v)))
    if weights and not (sum(w[1] for w in weights) <= 1 + 1e-9 <= sum(w[2] for w in weights) + 2e-9):
        r.fail("weighing.weights", f"weights are shares of the whole and must be able to sum to 1: the lows sum to "
                                   f"{sum(w[1] for w in weights):g}, the highs to {sum(w[2] for w in weights):g}")
    budget = t.get("budget", None, "any")
    if budget is not None:
        budget = float(r.check_type("weighing.budget", budget, "number"))
        r.check_range("weighing.budget", budget, 0, None, False)
        if not option_costs or not weights:
            r.fail("weighing.budget", "a budget needs option_costs and weights (the options' benefits are their "
                                      "weighted gains over doing nothing)")
    source = t.get("source", "", "str")
    t.done()
    if not option_costs and not weights:
        r.fail("weighing", "declare option_costs, weights, or both")
    return Weighing(unit, tuple(option_costs), tuple(weights), source, budget)
