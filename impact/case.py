"""Read and validate a case file (TOML) into frozen dataclasses.

All checks on user input happen here, once; later stages trust what they receive.
A numeric field holds either a number (a fixed value) or the name of a declared parameter
(an uncertain value with a prior, unit and source).
"""

from __future__ import annotations

import hashlib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import CaseError, ReadError
from .priors import DISTRIBUTIONS, Fixed, Prior, prior_problems

Quantity = float | str  # a number, or the name of a parameter in [parameters]

GROWTH_FORMS = ("logistic", "exponential", "none")
RESPONSES = ("holling1", "holling2", "holling3", "beddington-deangelis")
INTERACTION_KINDS = ("predation", "scavenging", "competition", "mutualism", "alternative-food")
OTHER_FOOD = "'s other food"  # a consumer's constant alternative food is named CONSUMER + this
# how a beneficiary depends on its mutualist partner: a bonus on births, or no births without it
DEPENDENCES = ("facultative", "obligate")
# what the assessment wants for a species: options are meant to remove or reduce a target,
# to spare a protected species; every other species is watched for side effects
ROLES = ("target", "protected", "other")
# what an objective looks at, per member, by its horizon
MEASURES = ("abundance", "quasi_extinction", "outbreak")
# what counts as met: a chance of the objective's event, or a paired change of that chance
REQUIREMENTS = ("chance_at_least", "chance_at_most", "increase_at_most", "decrease_at_least")
# defaults of the [risk] table's judgement fields (documented in README)
DEFAULT_MATERIAL_CHANGE = 0.2
DEFAULT_MATERIAL_RISK = 0.05
DEFAULT_MIN_MEMBERS = 100
INTERVENTION_KINDS = (
    "press-harvest",
    "pulse-cull",
    "eradication",
    "fertility-control",
    "sterile-release",
    "carrying-capacity-change",
    "release",
    "first-arrival",
)
# older names still read, each as a documented alias of the name it maps to
KIND_ALIASES = {"habitat-change": "carrying-capacity-change", "introduction": "release"}
# kinds acting over [start, end] (optionally only in some parts of every season)
SPAN_KINDS = ("press-harvest", "fertility-control", "sterile-release", "carrying-capacity-change")
# kinds adding animals at one time
ARRIVAL_KINDS = ("release", "first-arrival")
CARRION = "carrion"


@dataclass(frozen=True)
class Parameter:
    name: str
    prior: Prior
    unit: str
    source: str
    description: str

    @property
    def uncertain(self) -> bool:
        return not isinstance(self.prior, Fixed)


@dataclass(frozen=True)
class Species:
    name: str
    growth: str
    growth_rate: Quantity
    carrying_capacity: Quantity | None
    mortality: Quantity
    initial: Quantity
    present: bool
    noise_sd: Quantity
    quasi_extinction: float
    outbreak: float | None
    generation_time: float | None
    unit: str
    carrion_yield: float
    description: str
    role: str = "other"
    material_change: float | None = None
    crowding_mortality: Quantity = 0.0
    breeding_season: tuple[int, int] | None = None  # first and last part of the season with births
    breeding_outside: float = 0.0  # births multiplier outside the breeding season
    breeding_amplitude: Quantity | None = None  # sinusoidal breeding: births × (1 + A cos(...))
    breeding_peak: float | None = None  # the season part where a sinusoidal breeding season peaks
    matures_into: str | None = None  # this species is the juvenile stage of that one
    maturation_rate: Quantity = 0.0


@dataclass(frozen=True)
class Feeding:
    """Predation, scavenging or alternative food: ``consumer`` eats ``resource`` (a species, the
    carrion pool, or a constant food of density ``food_density`` named CONSUMER + OTHER_FOOD)."""

    kind: str
    consumer: str
    resource: str
    response: str
    attack_rate: Quantity
    handling_time: Quantity
    efficiency: Quantity
    interference: Quantity = 0.0
    food_density: Quantity | None = None  # alternative food only: its constant density


@dataclass(frozen=True)
class Competition:
    """Lotka–Volterra competition: ``competitor`` reduces the logistic growth of ``species``."""

    species: str
    competitor: str
    coefficient: Quantity


@dataclass(frozen=True)
class Mutualism:
    """Saturating benefit of ``partner`` to the births of ``beneficiary``.

    Facultative: births × (1 + max_benefit·P/(half_saturation + P)). Obligate: births ×
    P/(half_saturation + P), none without the partner (``max_benefit`` is 0 and unused); with
    several obligate partners, births × (1 − Π half_saturation/(half_saturation + P)).
    """

    beneficiary: str
    partner: str
    max_benefit: Quantity
    half_saturation: Quantity
    obligate: bool = False


@dataclass(frozen=True)
class Carrion:
    decay_rate: Quantity
    initial: float


@dataclass(frozen=True)
class Observation:
    species: str
    low: float
    high: float
    source: str


@dataclass(frozen=True)
class Intervention:
    name: str
    kind: str
    species: str
    start: float
    end: float
    rate: Quantity | None = None
    fraction: Quantity | None = None
    times: tuple[float, ...] = ()
    failure_probability: Quantity = 0.0
    residual_fraction: Quantity = 0.0
    amount: Quantity | None = None
    factor: Quantity | None = None
    carcasses_to_carrion: bool = False
    description: str = ""
    sterile_density: Quantity | None = None
    competitiveness: Quantity = 1.0
    windows: tuple[tuple[float, float], ...] = ()  # active spans when scheduled by season
    season_parts: tuple[int, int] | None = None  # the parts of every season it acts in, as declared

    def event_times(self) -> tuple[float, ...]:
        """Times at which the state jumps (culls, eradication, releases)."""
        if self.kind == "pulse-cull":
            return self.times
        if self.kind in ("eradication", *ARRIVAL_KINDS):
            return (self.start,)
        return ()

    def active(self, t: float) -> bool:
        """Whether a span intervention acts at time ``t`` (inside a segment)."""
        if self.windows:
            return any(a <= t < b for a, b in self.windows)
        return self.start <= t < self.end

    def boundaries(self) -> tuple[float, ...]:
        """Times where the intervention's controls switch (segment boundaries)."""
        edges = {self.start, self.end, *self.event_times()}
        for a, b in self.windows:
            edges.update((a, b))
        return tuple(sorted(edges))


@dataclass(frozen=True)
class Seasons:
    """The optional ``[seasons]`` table: a season of ``length`` time units cut into ``parts``.

    Time 0 (today) is the start of a season; part k (1-based) covers
    [(k − 1)·length/parts, k·length/parts) of every season.
    """

    length: float
    parts: int = 1
    part_name: str = "part"

    def windows(self, first: int, last: int, t0: float, t1: float) -> tuple[tuple[float, float], ...]:
        """Spans inside [t0, t1] that fall in parts ``first``..``last`` (inclusive; wraps when
        ``first > last``), merged where they touch."""
        L, P = self.length, self.parts
        pieces = [((first - 1) / P, last / P)] if first <= last else [(0.0, last / P), ((first - 1) / P, 1.0)]
        spans: list[list[float]] = []
        for k in range(math.floor(t0 / L) - 1, math.ceil(t1 / L) + 1):
            for a, b in pieces:
                lo, hi = max(t0, L * (k + a)), min(t1, L * (k + b))
                if hi <= lo:
                    continue
                if spans and abs(spans[-1][1] - lo) <= 1e-12 * max(1.0, abs(lo)):
                    spans[-1][1] = hi
                else:
                    spans.append([lo, hi])
        return tuple((a, b) for a, b in spans)

    def peak_time(self, part: float) -> float:
        """Time within a season of the middle of part ``part`` (1-based; fractions allowed)."""
        return (part - 0.5) * self.length / self.parts

    def starts_of_part(self, part: int, t0: float, t1: float) -> tuple[float, ...]:
        """Times in [t0, t1] at which part ``part`` of a season begins."""
        L, P = self.length, self.parts
        ks = range(math.floor(t0 / L) - 1, math.ceil(t1 / L) + 1)
        return tuple(t for t in (L * (k + (part - 1) / P) for k in ks) if t0 <= t <= t1)


@dataclass(frozen=True)
class Option:
    name: str
    interventions: tuple[str, ...]
    description: str


@dataclass(frozen=True)
class Objective:
    """What an option should achieve for one species, judged on the members' outcomes.

    The objective's *event* is, per member: the abundance at ``horizon`` lying below (or
    above) ``level`` for ``measure = "abundance"``; falling below the species'
    quasi-extinction level by ``horizon``; exceeding its outbreak level by ``horizon``.
    ``requirement`` says what counts as met: the event's chance under the option at least /
    at most ``bound``, or its paired change against the baseline (option minus baseline, on
    the same members) at most / at least ``bound``.
    """

    name: str
    species: str
    measure: str
    horizon: float
    requirement: str
    bound: float
    level: float | None = None
    below: bool = True
    description: str = ""

    @property
    def event_is_good(self) -> bool:
        """Whether the option should make the event more likely."""
        return self.requirement == "chance_at_least"


@dataclass(frozen=True)
class ParameterGroup:
    """Uncertain parameters that one measurement or study would learn together (for the value of information)."""

    name: str
    parameters: tuple[str, ...]
    description: str = ""


@dataclass(frozen=True)
class Risk:
    horizons: tuple[float, ...]
    recovery_fraction: float
    confidence: float
    material_change: float = DEFAULT_MATERIAL_CHANGE
    material_risk: float = DEFAULT_MATERIAL_RISK
    min_members: int = DEFAULT_MIN_MEMBERS


@dataclass(frozen=True)
class Case:
    path: str
    sha256: str
    title: str
    analyst: str
    description: str
    invented: bool
    time_unit: str
    horizon: float
    output_step: float
    spinup: float
    members: int
    max_draws: int
    seed: int
    rtol: float
    atol: float
    parameters: tuple[Parameter, ...]
    species: tuple[Species, ...]
    feeding: tuple[Feeding, ...]
    competition: tuple[Competition, ...]
    mutualism: tuple[Mutualism, ...]
    carrion: Carrion | None
    observed: tuple[Observation, ...]
    interventions: tuple[Intervention, ...]
    options: tuple[Option, ...]
    risk: Risk
    notes: tuple[str, ...] = field(default=())
    objectives: tuple[Objective, ...] = field(default=())
    groups: tuple[ParameterGroup, ...] = field(default=())
    dynamics: "DynamicsTable | None" = None
    monitoring: "tuple[MonitoringSeries, ...]" = ()
    change_limits: "tuple[ChangeLimit, ...]" = ()
    calibration: "CalibrationTable | None" = None
    seasons: Seasons | None = None

    @property
    def species_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.species)

    @property
    def uncertain(self) -> tuple[Parameter, ...]:
        return tuple(p for p in self.parameters if p.uncertain)

    def parameter(self, name: str) -> Parameter:
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def species_by_name(self, name: str) -> Species:
        for s in self.species:
            if s.name == name:
                return s
        raise KeyError(name)

    def material_change(self, species: str) -> float:
        """Paired relative change of mean abundance that counts as material for ``species``."""
        own = self.species_by_name(species).material_change
        return self.risk.material_change if own is None else own

    def touched(self, option: Option) -> frozenset[str]:
        """Species that an intervention of ``option`` acts on directly."""
        return frozenset(self.intervention(n).species for n in option.interventions)

    def intervention(self, name: str) -> Intervention:
        for iv in self.interventions:
            if iv.name == name:
                return iv
        raise KeyError(name)


def schedule_text(case: Case, iv: Intervention) -> str:
    """How an intervention is scheduled by season, in words ("" when it is not)."""
    if iv.season_parts is None or case.seasons is None:
        return ""
    first, last = iv.season_parts
    return f"only in {case.seasons.part_name}s {first}–{last} of every season"


# --------------------------------------------------------------------------------------------
# reading helpers


class _Table:
    """A TOML table being consumed: every key must be read, leftovers are typos."""

    def __init__(self, reader: "_Reader", data: Any, path: str):
        self.r = reader
        self.path = path
        if not isinstance(data, dict):
            reader.fail(path, f"must be a table, got {type(data).__name__}")
        self.data = dict(data)
        self.allowed: list[str] = []

    def _field(self, key: str) -> str:
        return f"{self.path}.{key}" if self.path else key

    def get(self, key: str, default: Any = ..., kind: str = "any") -> Any:
        self.allowed.append(key)
        if key not in self.data:
            if default is ...:
                self.r.fail(self._field(key), "is required but missing")
            return default
        value = self.data.pop(key)
        return self.r.check_type(self._field(key), value, kind)

    def number(self, key, default: Any = ..., *, low=None, high=None, low_open=False, integer=False):
        present = key in self.data
        v = self.get(key, default, "int" if integer else "number")
        if present:
            self.r.check_range(self._field(key), v, low, high, low_open)
        return v

    def quantity(self, key, default: Any = ..., *, low=None, high=None, low_open=False) -> Quantity:
        """A number, or the name of a parameter whose prior support must respect the bounds."""
        self.allowed.append(key)
        if key not in self.data:
            if default is ...:
                self.r.fail(self._field(key), "is required but missing (a number or a parameter name)")
            return default
        v = self.data.pop(key)
        f = self._field(key)
        if isinstance(v, bool) or not isinstance(v, (int, float, str)):
            self.r.fail(f, f"must be a number or the name of a parameter, got {type(v).__name__}")
        if isinstance(v, str):
            self.r.references.append((f, v, low, high, low_open))
            return v
        if not math.isfinite(v):
            self.r.fail(f, f"must be a finite number or the name of a parameter, got {v!r}")
        self.r.check_range(f, float(v), low, high, low_open)
        return float(v)

    def done(self):
        if self.data:
            extra = sorted(self.data)
            self.r.fail(
                self._field(extra[0]),
                f"unknown key {extra[0]!r}; allowed keys here: {', '.join(sorted(set(self.allowed)))}",
            )


class _Reader:
    def __init__(self, path: Path):
        self.path = path
        self.references: list[tuple[str, str, Any, Any, bool]] = []

    def fail(self, field_path: str, message: str):
        raise CaseError(str(self.path), field_path, message)

    def check_type(self, f: str, v: Any, kind: str):
        if kind == "number":
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                self.fail(f, f"must be a number, got {v!r}")
            if not math.isfinite(v):
                self.fail(f, f"must be finite, got {v!r}")
            return float(v)
        if kind == "int":
            if isinstance(v, bool) or not isinstance(v, int):
                self.fail(f, f"must be a whole number, got {v!r}")
            return v
        if kind == "str":
            if not isinstance(v, str):
                self.fail(f, f"must be a text string, got {v!r}")
            return v
        if kind == "bool":
            if not isinstance(v, bool):
                self.fail(f, f"must be true or false, got {v!r}")
            return v
        if kind == "list":
            if not isinstance(v, list):
                self.fail(f, f"must be a list, got {v!r}")
            return v
        return v

    def check_range(self, f, v, low, high, low_open):
        if low is not None and (v <= low if low_open else v < low):
            self.fail(f, f"must be {'>' if low_open else '>='} {low:g}, got {v:g}")
        if high is not None and v > high:
            self.fail(f, f"must be <= {high:g}, got {v:g}")

    def choice(self, f: str, v: str, allowed):
        if v not in allowed:
            self.fail(f, f"{v!r} is not allowed; choose one of: {', '.join(allowed)}")
        return v


def _unique(reader: _Reader, items, key: str, what: str):
    seen = set()
    for i, item in enumerate(items):
        name = getattr(item, key)
        if name in seen:
            reader.fail(f"{what}[{i}].{key}", f"duplicate name {name!r}; names must be unique")
        seen.add(name)


def _read_parameter(r: _Reader, name: str, data: Any) -> Parameter:
    t = _Table(r, data, f"parameters.{name}")
    dist = t.get("distribution", "fixed", "str")
    r.choice(f"parameters.{name}.distribution", dist, tuple(DISTRIBUTIONS))
    cls, required, optional = DISTRIBUTIONS[dist]
    args = {k: t.number(k) for k in required}
    for k, d in optional.items():
        args[k] = t.number(k, d)
    unit = t.get("unit", "", "str")
    source = t.get("source", "", "str")
    description = t.get("description", "", "str")
    t.done()
    prior = cls(**args)
    for f, msg in prior_problems(prior):
        r.fail(f"parameters.{name}.{f}", msg)
    return Parameter(name, prior, unit, source, description)


def load_case(path: str | Path) -> Case:
    """Read, validate and freeze a case file.

    Raises
    ------
    CaseError
        Naming the file, the field path and what is allowed, for any problem.
    """
    path = Path(path)
    try:
        raw_bytes = path.read_bytes()
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot read the case file ({exc.strerror or exc})") from None
    try:
        data = tomllib.loads(raw_bytes.decode("utf-8"))
    except UnicodeDecodeError:
        raise CaseError(str(path), "", "is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise CaseError(str(path), "", f"malformed TOML: {exc}") from None
    except RecursionError:
        raise CaseError(str(path), "", "values are nested too deeply (arrays or tables inside each other "
                                       "hundreds of levels deep); no case field needs more than two levels") from None
    return parse_case(data, path, hashlib.sha256(raw_bytes).hexdigest())


def unused_parameters(case: Case) -> tuple[str, ...]:
    """Declared parameters that no numeric field of the case refers to, in declaration order.

    They are sampled like the others (so the random streams of every member stay as declared)
    and show no influence in the sensitivity tables; the command line warns about them.
    """
    used = set()
    for item in (*case.species, *case.feeding, *case.competition, *case.mutualism, *case.interventions,
                 *((case.carrion,) if case.carrion is not None else ()), *case.monitoring):
        for f in item.__dataclass_fields__.values():
            v = getattr(item, f.name)
            if "Quantity" in str(f.type) and isinstance(v, str):
                used.add(v)
    return tuple(p.name for p in case.parameters if p.name not in used)


def parse_case(data: dict, path: Path, sha256: str = "") -> Case:
    r = _Reader(path)
    top = _Table(r, data, "")

    meta = _Table(r, top.get("case"), "case")
    title = meta.get("title", kind="str")
    analyst = meta.get("analyst", "", "str")
    description = meta.get("description", "", "str")
    invented = meta.get("invented", False, "bool")
    time_unit = meta.get("time_unit", kind="str")
    horizon = meta.number("horizon", low=0, low_open=True)
    output_step = meta.number("output_step", 1.0, low=0, low_open=True)
    spinup = meta.number("spinup", 0.0, low=0)
    members = meta.number("members", 1000, low=1, integer=True)
    max_draws = meta.number("max_draws", 20 * members, low=members, integer=True)
    seed = meta.number("seed", 0, low=0, integer=True)
    rtol = meta.number("rtol", 1e-6, low=0, low_open=True, high=0.1)
    atol = meta.number("atol", 1e-9, low=0, low_open=True)
    notes = tuple(meta.get("assumptions", [], "list"))
    meta.done()
    if any(not isinstance(n, str) for n in notes):
        r.fail("case.assumptions", "must be a list of text strings")
    if output_step > horizon:
        r.fail("case.output_step", f"must not exceed the horizon ({horizon:g})")

    params_raw = top.get("parameters", {}, "any")
    if not isinstance(params_raw, dict):
        r.fail("parameters", "must be a table of named parameters")
    parameters = tuple(_read_parameter(r, n, v) for n, v in params_raw.items())

    seasons = _read_seasons(r, top.get("seasons", None, "any"))
    species_raw = top.get("species", kind="list")
    if not species_raw:
        r.fail("species", "at least one species is required")
    species = []
    for i, raw in enumerate(species_raw):
        t = _Table(r, raw, f"species[{i}]")
        name = t.get("name", kind="str")
        if name == CARRION:
            r.fail(f"species[{i}].name", f"{CARRION!r} is reserved for the carrion pool")
        t.path = f"species.{name}"
        growth = r.choice(f"species.{name}.growth", t.get("growth", "none", "str"), GROWTH_FORMS)
        if growth == "logistic":
            gr = t.quantity("growth_rate", low=0, low_open=True)
            k = t.quantity("carrying_capacity", low=0, low_open=True)
        elif growth == "exponential":
            gr = t.quantity("growth_rate")  # negative allowed: exponential decline
            k = None
        else:
            gr, k = 0.0, None
        mortality = t.quantity("mortality", 0.0, low=0)
        present = t.get("present", True, "bool")
        initial = t.quantity("initial", low=0) if present else t.quantity("initial", 0.0, low=0)
        noise = t.quantity("noise_sd", 0.0, low=0)
        qe = t.number("quasi_extinction", low=0)
        outbreak = t.number("outbreak", None, low=0, low_open=True)
        gen = t.number("generation_time", None, low=0, low_open=True)
        unit = t.get("unit", "individuals", "str")
        cy = t.number("carrion_yield", 1.0, low=0)
        desc = t.get("description", "", "str")
        role = r.choice(f"species.{name}.role", t.get("role", "other", "str"), ROLES)
        material = t.number("material_change", None, low=0, low_open=True)
        crowding = t.quantity("crowding_mortality", 0.0, low=0)
        breeding, outside, amplitude, peak = _read_breeding(r, t.get("breeding_season", None, "any"),
                                                            f"species.{name}.breeding_season", seasons)
        adult = t.get("matures_into", None, "str")
        maturation = 0.0
        if adult is not None:
            if growth != "none":
                r.fail(f"species.{name}.growth", "a juvenile stage (matures_into) does not breed: growth must be "
                                                 "\"none\"; its numbers come from the births of the stage it matures into")
            maturation = t.quantity("maturation_rate", low=0, low_open=True)
        t.done()
        species.append(Species(name, growth, gr, k, mortality, initial, present, noise, qe, outbreak, gen, unit, cy, desc,
                               role, material, crowding, breeding, outside, amplitude, peak, adult, maturation))
    species = tuple(species)
    _unique(r, species, "name", "species")
    names = {s.name for s in species}
    _check_stages(r, species)

    def species_ref(f, v, allow_carrion=False):
        if v == CARRION and allow_carrion:
            return v
        if v not in names:
            allowed = sorted(names) + ([CARRION] if allow_carrion else [])
            r.fail(f, f"unknown species {v!r}; declared species: {', '.join(allowed)}")
        return v

    feeding, competition, mutualism = [], [], []
    for i, raw in enumerate(top.get("interactions", [], "list")):
        t = _Table(r, raw, f"interactions[{i}]")
        if "kind" in t.data and "type" in t.data:
            r.fail(f"interactions[{i}].type", "give the interaction's kind once: `kind` (`type` is its older alias)")
        key = "type" if "type" in t.data else "kind"
        kind = r.choice(f"interactions[{i}].{key}", t.get(key, kind="str"), INTERACTION_KINDS)
        if kind in ("predation", "scavenging", "alternative-food"):
            who = {"predation": "predator", "scavenging": "scavenger", "alternative-food": "consumer"}[kind]
            consumer = species_ref(f"interactions[{i}].{who}", t.get(who, kind="str"))
            density = None
            if kind == "predation":
                resource = species_ref(f"interactions[{i}].prey", t.get("prey", kind="str"))
                if resource == consumer:
                    r.fail(f"interactions[{i}].prey", "a predator cannot be its own prey in this model")
            elif kind == "alternative-food":
                resource = consumer + OTHER_FOOD
                if any(f.resource == resource for f in feeding):
                    r.fail(f"interactions[{i}].consumer", f"{consumer!r} already has an alternative food; "
                                                          "declare one per consumer (its density can be a parameter)")
                density = t.quantity("density", low=0)
            else:
                resource = CARRION
            response = r.choice(f"interactions[{i}].response", t.get("response", "holling2", "str"), RESPONSES)
            attack = t.quantity("attack_rate", low=0, low_open=True)
            handling = t.quantity("handling_time", 0.0, low=0)
            if response in ("holling2", "holling3") and handling == 0.0:
                r.fail(f"interactions[{i}].handling_time", f"is required and must be > 0 for a {response} response")
            eff = t.quantity("efficiency", low=0)
            if response != "beddington-deangelis" and "interference" in t.data:
                r.fail(f"interactions[{i}].interference", "applies only to response = \"beddington-deangelis\"")
            interference = t.quantity("interference", 0.0, low=0)
            feeding.append(Feeding(kind, consumer, resource, response, attack, handling, eff, interference, density))
        elif kind == "competition":
            sp = species_ref(f"interactions[{i}].species", t.get("species", kind="str"))
            comp = species_ref(f"interactions[{i}].competitor", t.get("competitor", kind="str"))
            if next(s for s in species if s.name == sp).growth != "logistic":
                r.fail(f"interactions[{i}].species", f"competition acts on logistic growth; {sp!r} is not logistic")
            coef = t.quantity("coefficient", low=0)
            competition.append(Competition(sp, comp, coef))
        else:
            ben = species_ref(f"interactions[{i}].beneficiary", t.get("beneficiary", kind="str"))
            par = species_ref(f"interactions[{i}].partner", t.get("partner", kind="str"))
            if par == ben:
                r.fail(f"interactions[{i}].partner", "a species cannot be its own mutualist partner")
            if next(s for s in species if s.name == ben).growth == "none":
                r.fail(f"interactions[{i}].beneficiary", f"a mutualism acts on births at growth_rate; {ben!r} has "
                                                         "growth = \"none\" (give it logistic or exponential growth)")
            dep = r.choice(f"interactions[{i}].dependence", t.get("dependence", "facultative", "str"), DEPENDENCES)
            if dep == "obligate":
                if "max_benefit" in t.data:
                    r.fail(f"interactions[{i}].max_benefit", "an obligate mutualism has no max_benefit: births are "
                                                             "r·P/(half_saturation + P), at most r")
                mb = 0.0
            else:
                mb = t.quantity("max_benefit", low=0)
            hs = t.quantity("half_saturation", low=0, low_open=True)
            if any(u.beneficiary == ben and u.partner == par for u in mutualism):
                r.fail(f"interactions[{i}].partner", f"{par!r} is already declared a mutualist partner of {ben!r}")
            mutualism.append(Mutualism(ben, par, mb, hs, dep == "obligate"))
        t.done()

    _check_interference(r, feeding)
    carrion = None
    if "carrion" in top.data:
        t = _Table(r, top.get("carrion"), "carrion")
        carrion = Carrion(t.quantity("decay_rate", low=0, low_open=True), t.number("initial", 0.0, low=0))
        t.done()
    if any(f.kind == "scavenging" for f in feeding) and carrion is None:
        r.fail("carrion", "a scavenging interaction needs a [carrion] table with decay_rate")

    observed = []
    for i, raw in enumerate(top.get("observed", [], "list")):
        t = _Table(r, raw, f"observed[{i}]")
        sp = species_ref(f"observed[{i}].species", t.get("species", kind="str"))
        lo = t.number("low", low=0)
        hi = t.number("high", low=0)
        if not lo < hi:
            r.fail(f"observed[{i}].high", f"must be greater than low ({lo:g}); bounds reversed or equal")
        observed.append(Observation(sp, lo, hi, t.get("source", "", "str")))
        t.done()

    interventions = []
    for i, raw in enumerate(top.get("interventions", [], "list")):
        t = _Table(r, raw, f"interventions[{i}]")
        name = t.get("name", kind="str")
        t.path = f"interventions.{name}"
        base = f"interventions.{name}"
        given = t.get("kind", kind="str")
        kind = r.choice(f"{base}.kind", KIND_ALIASES.get(given, given), INTERVENTION_KINDS + tuple(KIND_ALIASES))
        sp = species_ref(f"{base}.species", t.get("species", kind="str"))
        target = next(s for s in species if s.name == sp)
        kw: dict[str, Any] = {}
        if kind in SPAN_KINDS:
            start = t.number("start", 0.0)
            end = t.number("end", horizon)
            if kind == "press-harvest":
                kw["rate"] = t.quantity("rate", low=0)
                kw["carcasses_to_carrion"] = t.get("carcasses_to_carrion", False, "bool")
            elif kind == "fertility-control":
                kw["fraction"] = t.quantity("fraction", low=0, high=1)
            elif kind == "sterile-release":
                kw["sterile_density"] = t.quantity("sterile_density", low=0, low_open=True)
                kw["competitiveness"] = t.quantity("competitiveness", 1.0, low=0, low_open=True)
            else:
                if target.growth != "logistic":
                    r.fail(f"{base}.species", f"a carrying-capacity change scales a carrying capacity; {sp!r} is not logistic")
                kw["factor"] = t.quantity("factor", low=0, low_open=True)
            parts = t.get("season_parts", None, "list")
            if parts is not None:
                first, last = _season_span(r, f"{base}.season_parts", parts, seasons)
                kw["windows"] = seasons.windows(first, last, start, end)
                kw["season_parts"] = (first, last)
        elif kind == "pulse-cull":
            if ("times" in t.data) == ("season_part" in t.data):
                r.fail(f"{base}.times", "give exactly one of times (a list of cull times) or season_part "
                                        "(a cull at the start of that part of every season between start and end)")
            if "times" in t.data:
                times = t.get("times", kind="list")
                if not times or any(isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x)
                                    for x in times):
                    r.fail(f"{base}.times", "must be a non-empty list of finite numbers (times of each cull)")
            else:
                part = t.number("season_part", integer=True)
                first, _ = _season_span(r, f"{base}.season_part", [part, part], seasons)
                times = seasons.starts_of_part(first, t.number("start", 0.0), t.number("end", horizon))
                if not times:
                    r.fail(f"{base}.season_part", "no season reaches that part between start and end")
            times = tuple(sorted(float(x) for x in times))
            kw["times"] = times
            kw["fraction"] = t.quantity("fraction", low=0, high=1)
            kw["carcasses_to_carrion"] = t.get("carcasses_to_carrion", False, "bool")
            start, end = times[0], times[-1]
        elif kind == "eradication":
            start = t.number("time")
            end = start
            kw["failure_probability"] = t.quantity("failure_probability", 0.0, low=0, high=1)
            kw["residual_fraction"] = t.quantity("residual_fraction", 0.0, low=0, high=1)
        else:  # release or first arrival
            if kind == "first-arrival" and target.present:
                r.fail(f"{base}.species", f"a first arrival brings a species absent today; {sp!r} is declared present "
                                          "(use kind = \"release\" to add to a present population, or set present = false)")
            start = t.number("time")
            end = start
            kw["amount"] = t.quantity("amount", low=0, low_open=True)
        for label, v in (("start" if kind not in ("eradication", *ARRIVAL_KINDS) else "time", start), ("end", end)):
            if not 0 <= v <= horizon:
                r.fail(f"{base}.{label}" if kind != "pulse-cull" else f"{base}.times",
                       f"{v:g} lies outside the assessment period [0, {horizon:g}] {time_unit}")
        if end < start:
            r.fail(f"{base}.end", f"must not be before start ({start:g})")
        desc = t.get("description", "", "str")
        t.done()
        interventions.append(Intervention(name, kind, sp, start, end, description=desc, **kw))
    interventions = tuple(interventions)
    _unique(r, interventions, "name", "interventions")
    iv_names = {iv.name for iv in interventions}

    options = []
    for i, raw in enumerate(top.get("options", [], "list")):
        t = _Table(r, raw, f"options[{i}]")
        name = t.get("name", kind="str")
        if name == "baseline":
            r.fail(f"options[{i}].name", "'baseline' is reserved for the no-intervention run")
        ivs = t.get("interventions", kind="list")
        if not ivs:
            r.fail(f"options.{name}.interventions", "must list at least one intervention")
        for k, iv in enumerate(ivs):
            if not isinstance(iv, str):
                r.fail(f"options.{name}.interventions", f"must be a list of intervention names (text), got {iv!r}")
            if iv not in iv_names:
                r.fail(f"options.{name}.interventions", f"unknown intervention {iv!r}; declared: {', '.join(sorted(iv_names)) or 'none'}")
            if iv in ivs[:k]:
                r.fail(f"options.{name}.interventions", f"lists {iv!r} twice; an intervention applies once per option "
                                                        "(declare a second intervention to apply more)")
        options.append(Option(name, tuple(ivs), t.get("description", "", "str")))
        t.done()
    options = tuple(options)
    _unique(r, options, "name", "options")
    if not options:
        r.fail("options", "at least one intervention option is required to compare with the baseline")

    rt = _Table(r, top.get("risk", {}), "risk")
    horizons = rt.get("horizons", [horizon], "list")
    if not horizons or any(isinstance(h, bool) or not isinstance(h, (int, float)) or not 0 < h <= horizon for h in horizons):
        r.fail("risk.horizons", f"must be a non-empty list of times in (0, {horizon:g}]")
    dynamics = _read_dynamics(r, top.get("dynamics", None, "any"), [s.name for s in species])
    risk = Risk(
        tuple(sorted(float(h) for h in horizons)),
        rt.number("recovery_fraction", 0.8, low=0, low_open=True, high=1),
        rt.number("confidence", 0.95, low=0.5, high=0.999),
        rt.number("material_change", DEFAULT_MATERIAL_CHANGE, low=0, low_open=True),
        rt.number("material_risk", DEFAULT_MATERIAL_RISK, low=0, low_open=True, high=1),
        rt.number("min_members", DEFAULT_MIN_MEMBERS, low=1, integer=True),
    )
    rt.done()
    objectives = tuple(_read_objective(r, i, raw, species, horizon, risk.horizons)
                       for i, raw in enumerate(top.get("objectives", [], "list")))
    _unique(r, objectives, "name", "objectives")
    uncertain = {p.name for p in parameters if p.uncertain}
    groups = tuple(_read_group(r, i, raw, uncertain) for i, raw in enumerate(top.get("parameter_groups", [], "list")))
    _unique(r, groups, "name", "parameter_groups")
    monitoring = tuple(_read_monitoring(r, i, raw, names, spinup) for i, raw in enumerate(top.get("monitoring", [], "list")))
    _unique(r, monitoring, "species", "monitoring")
    limits = tuple(_read_change_limit(r, i, raw, names, spinup) for i, raw in enumerate(top.get("change_limits", [], "list")))
    calibration = _read_calibration(r, top.get("calibration", None, "any"))
    top.done()

    pnames = {p.name: p for p in parameters}
    for f, ref, low, high, low_open in r.references:
        if ref not in pnames:
            r.fail(f, f"refers to parameter {ref!r}, which is not declared in [parameters]; declared: {', '.join(sorted(pnames)) or 'none'}")
        lo_s, hi_s = pnames[ref].prior.support()
        if low is not None and (lo_s <= low if low_open else lo_s < low):
            r.fail(f, f"parameter {ref!r} can take values down to {lo_s:g}, but this field must be {'>' if low_open else '>='} {low:g}")
        if high is not None and hi_s > high:
            r.fail(f, f"parameter {ref!r} can take values up to {hi_s:g}, but this field must be <= {high:g}")

    return Case(
        path=str(path), sha256=sha256, title=title, analyst=analyst, description=description,
        invented=invented, time_unit=time_unit, horizon=horizon, output_step=output_step,
        spinup=spinup, members=members, max_draws=max_draws, seed=seed, rtol=rtol, atol=atol,
        parameters=parameters, species=species, feeding=tuple(feeding),
        competition=tuple(competition), mutualism=tuple(mutualism), carrion=carrion,
        observed=tuple(observed), interventions=interventions, options=options, risk=risk, notes=notes,
        objectives=objectives, groups=groups, dynamics=dynamics, seasons=seasons,
        monitoring=monitoring, change_limits=limits, calibration=calibration,
    )


def _read_group(r: _Reader, i: int, raw: Any, uncertain: set[str]) -> ParameterGroup:
    """One ``[[parameter_groups]]`` entry: a name and two or more uncertain parameters."""
    t = _Table(r, raw, f"parameter_groups[{i}]")
    name = t.get("name", kind="str")
    t.path = base = f"parameter_groups.{name}"
    members = t.get("parameters", kind="list")
    if len(members) < 2 or any(not isinstance(m, str) for m in members) or len(set(members)) != len(members):
        r.fail(f"{base}.parameters", "must list two or more different parameter names")
    for m in members:
        if m not in uncertain:
            r.fail(f"{base}.parameters", f"{m!r} is not an uncertain parameter; uncertain: {', '.join(sorted(uncertain)) or 'none'}")
    desc = t.get("description", "", "str")
    t.done()
    return ParameterGroup(name, tuple(members), desc)


def _read_objective(r: _Reader, i: int, raw: Any, species: tuple[Species, ...], horizon: float,
                    risk_horizons: tuple[float, ...]) -> Objective:
    """One ``[[objectives]]`` entry: species, measure, horizon, event level and requirement."""
    t = _Table(r, raw, f"objectives[{i}]")
    name = t.get("name", kind="str")
    t.path = base = f"objectives.{name}"
    by_name = {s.name: s for s in species}
    sp = t.get("species", kind="str")
    if sp not in by_name:
        r.fail(f"{base}.species", f"unknown species {sp!r}; declared species: {', '.join(sorted(by_name))}")
    measure = r.choice(f"{base}.measure", t.get("measure", kind="str"), MEASURES)
    allowed_h = sorted(set(risk_horizons) | {horizon})
    h = t.number("horizon", horizon)
    match = [a for a in allowed_h if abs(h - a) <= 1e-9 * max(1.0, a)]
    if not match:
        r.fail(f"{base}.horizon", f"{h:g} is not a risk horizon; allowed: {', '.join(f'{a:g}' for a in allowed_h)} "
                                  "(add it to risk.horizons to use it)")
    h = match[0]
    level, below = None, True
    if measure == "abundance":
        given = [k for k in ("below", "above") if k in t.data]
        if len(given) != 1:
            r.fail(f"{base}.below", "an abundance objective needs exactly one of below = LEVEL or above = LEVEL "
                                    "(the abundance the option should keep the species under, or over)")
        below = given[0] == "below"
        level = t.number(given[0], low=0)
    elif measure == "outbreak" and by_name[sp].outbreak is None:
        r.fail(f"{base}.measure", f"species {sp!r} declares no outbreak level; add species.{sp}.outbreak")
    given = [k for k in REQUIREMENTS if k in t.data]
    if len(given) != 1:
        r.fail(f"{base}.{given[1] if len(given) > 1 else 'chance_at_least'}",
               f"exactly one requirement is needed; choose one of: {', '.join(REQUIREMENTS)}")
    bound = t.number(given[0], low=0, high=1)
    desc = t.get("description", "", "str")
    t.done()
    return Objective(name, sp, measure, float(h), given[0], float(bound), level, below, desc)


@dataclass(frozen=True)
class DynamicsTable:
    """The optional ``[dynamics]`` table: settings of the regime diagnostics as declared.

    Every field is None when not declared (the stage then chooses it); times are in the case's
    time unit. ``section`` names the species whose maxima form the Poincaré section.
    """

    transient: float | None = None
    window: float | None = None
    sample_dt: float | None = None
    section: str | None = None
    eq_tol: float | None = None
    period_tol: float | None = None
    max_period: int | None = None
    env_tol: float | None = None
    confidence: float | None = None
    screen_members: int | None = None

    def declared(self) -> dict:
        """The declared numeric settings (``section`` aside), by name."""
        return {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "section" and getattr(self, k) is not None}


def _read_dynamics(r: _Reader, raw: Any, species: list[str]) -> DynamicsTable | None:
    """Read ``[dynamics]`` (absent: None)."""
    if raw is None:
        return None
    t = _Table(r, raw, "dynamics")
    out = DynamicsTable(
        transient=t.number("transient", None, low=0),
        window=t.number("window", None, low=0, low_open=True),
        sample_dt=t.number("sample_dt", None, low=0, low_open=True),
        section=t.get("section", None, "str"),
        eq_tol=t.number("eq_tol", None, low=0, low_open=True, high=1),
        period_tol=t.number("period_tol", None, low=0, low_open=True, high=1),
        max_period=t.number("max_period", None, low=1, high=64, integer=True),
        env_tol=t.number("env_tol", None, low=0, low_open=True, high=1),
        confidence=t.number("confidence", None, low=0.5, high=0.9999),
        screen_members=t.number("screen_members", None, low=1, integer=True),
    )
    t.done()
    if out.section is not None:
        r.choice("dynamics.section", out.section, species)
    return out


# --------------------------------------------------------------------------------------------
# monitoring data, limits on change, and the calibration settings

# what a monitoring series holds, and the observation models allowed for each
SERIES_KINDS = {"count": ("poisson", "negative-binomial"), "index": ("lognormal",)}
SERIES_COLUMNS = ("time", "value")
SAMPLERS = ("auto", "rejection", "smc")
DEFAULT_MIN_ACCEPTANCE = 0.05


@dataclass(frozen=True)
class MonitoringSeries:
    """A count series or an abundance index for one species, observed before today.

    Times are in the case's time unit relative to today (0 = the end of spin-up; negative is
    the past) and lie within the spin-up. The expected count is ``detection × scale × N`` and
    the median index ``scale × N``, for the model's abundance ``N`` at each time.

    Attributes
    ----------
    times, values : tuple of float (K,)
        Strictly increasing times; counts (whole numbers >= 0) or index values (> 0).
    error : str
        ``poisson`` or ``negative-binomial`` for counts, ``lognormal`` for an index.
    dispersion : Quantity or None
        Negative binomial size k (variance ``μ + μ²/k``).
    log_sd : Quantity or None
        Standard deviation of log(index) around log(scale × N).
    file : str or None
        The CSV file the values came from (as written in the case), if any.
    """

    species: str
    kind: str
    times: tuple[float, ...]
    values: tuple[float, ...]
    error: str
    detection: Quantity = 1.0
    scale: Quantity = 1.0
    dispersion: Quantity | None = None
    log_sd: Quantity | None = None
    source: str = ""
    file: str | None = None


@dataclass(frozen=True)
class ChangeLimit:
    """Declared bounds on how fast a species can change before today.

    Over every step of ``step`` time units from ``start`` to ``end`` (relative to today), the
    abundance may grow by at most a factor ``up`` and shrink by at most a factor ``down``
    (``down = 2``: never below half of the previous value), in proportion for a shorter step.
    """

    species: str
    up: float | None
    down: float | None
    step: float
    start: float
    end: float
    source: str = ""

    def check_times(self) -> tuple[float, ...]:
        """Times at which the abundance is compared with the previous one (start included)."""
        n = int(math.floor((self.end - self.start) / self.step + 1e-9))
        ts = [self.start + k * self.step for k in range(n + 1)]
        if self.end - ts[-1] > 1e-9 * max(1.0, abs(self.end)):
            ts.append(self.end)
        return tuple(round(t, 12) for t in ts)


@dataclass(frozen=True)
class CalibrationTable:
    """The optional ``[calibration]`` table: which sampler builds the ensemble and its budget.

    ``sampler = "auto"`` draws by rejection while at least ``min_acceptance`` of the prior draws
    are kept and there is no monitoring data to weigh, and by sequential Monte Carlo otherwise.
    ``max_simulations`` (default 200 per member) bounds the spin-ups a calibration may spend.
    """

    sampler: str = "auto"
    min_acceptance: float = DEFAULT_MIN_ACCEPTANCE
    max_simulations: int | None = None


def _series_from_csv(r: _Reader, where: str, name: str) -> tuple[list, list]:
    """Times and values from a CSV file named in the case (relative to the case file)."""
    import csv

    path = (Path(r.path).parent / name)
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise CaseError(str(path), "", f"is not UTF-8 text (named by {where}.file)") from None
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot read the monitoring file named by {where}.file "
                                       f"({exc.strerror or exc}); the path is relative to the case file") from None
    # lines starting with "#" are comments (a source, or a note that the data are invented)
    rows = [(k, row) for k, row in enumerate(csv.reader(text.splitlines()), start=1)
            if row and not row[0].lstrip().startswith("#") and any(c.strip() for c in row)]
    if not rows or [h.strip() for h in rows[0][1]] != list(SERIES_COLUMNS):
        raise CaseError(str(path), "header", f"the first line (after # comments) must be the columns "
                                             f"{','.join(SERIES_COLUMNS)}, one row per observation; got "
                                             f"{','.join(rows[0][1]) if rows else 'nothing'}")
    times, values = [], []
    for k, row in rows[1:]:
        if len(row) != 2:
            raise CaseError(str(path), f"line {k}", f"must hold 2 cells (time, value), got {len(row)}")
        for col, cell, out in zip(SERIES_COLUMNS, row, (times, values)):
            try:
                x = float(cell)
            except ValueError:
                raise CaseError(str(path), f"line {k}.{col}", f"must be a number, got {cell.strip()!r}") from None
            if not math.isfinite(x):
                raise CaseError(str(path), f"line {k}.{col}", f"must be finite, got {cell.strip()!r}")
            out.append(x)
    return times, values


def _series_values(r: _Reader, t: _Table, base: str) -> tuple[list, list, str | None]:
    """Times and values inline (``times``, ``values``) or from ``file``: exactly one of the two."""
    inline = [k for k in ("times", "values") if k in t.data]
    if "file" in t.data:
        if inline:
            r.fail(f"{base}.{inline[0]}", "give the series either inline (times, values) or in a file, not both")
        name = t.get("file", kind="str")
        return (*_series_from_csv(r, base, name), name)
    times, values = t.get("times", kind="list"), t.get("values", kind="list")
    for key, lst in (("times", times), ("values", values)):
        if any(isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) for x in lst):
            r.fail(f"{base}.{key}", "must be a list of finite numbers")
    return [float(x) for x in times], [float(x) for x in values], None


def _read_monitoring(r: _Reader, i: int, raw: Any, names: set[str], spinup: float) -> MonitoringSeries:
    """One ``[[monitoring]]`` entry: a species' count series or index, and its observation model."""
    t = _Table(r, raw, f"monitoring[{i}]")
    sp = t.get("species", kind="str")
    if sp not in names:
        r.fail(f"monitoring[{i}].species", f"unknown species {sp!r}; declared species: {', '.join(sorted(names))}")
    t.path = base = f"monitoring.{sp}"
    kind = r.choice(f"{base}.kind", t.get("kind", "count", "str"), tuple(SERIES_KINDS))
    error = r.choice(f"{base}.error", t.get("error", SERIES_KINDS[kind][0], "str"), SERIES_KINDS[kind])
    times, values, file = _series_values(r, t, base)
    where = f"{base}.{'file' if file else 'values'}"
    if len(times) != len(values):
        r.fail(where, f"{len(times)} times but {len(values)} values; give one value per time")
    if len(times) < 2:
        r.fail(where, "needs at least two observations")
    if any(b <= a for a, b in zip(times, times[1:])):
        r.fail(f"{base}.{'file' if file else 'times'}", "times must be strictly increasing")
    if times[0] < -spinup or times[-1] > 0:
        r.fail(f"{base}.{'file' if file else 'times'}",
               f"times are counted from today (0, the end of spin-up) and must lie in [{-spinup:g}, 0] "
               f"(case.spinup = {spinup:g}); got {times[0]:g} to {times[-1]:g}")
    if kind == "count" and any(v < 0 or v != math.floor(v) for v in values):
        r.fail(where, "counts must be whole numbers >= 0")
    if kind == "index" and any(v <= 0 for v in values):
        r.fail(where, "index values must be > 0 (a lognormal error needs positive values)")
    detection = t.quantity("detection", 1.0, low=0, low_open=True, high=1) if kind == "count" else 1.0
    scale = t.quantity("scale", 1.0, low=0, low_open=True)
    dispersion = t.quantity("dispersion", low=0, low_open=True) if error == "negative-binomial" else None
    log_sd = t.quantity("log_sd", low=0, low_open=True) if error == "lognormal" else None
    source = t.get("source", "", "str")
    t.done()
    return MonitoringSeries(sp, kind, tuple(times), tuple(values), error, detection, scale, dispersion, log_sd,
                            source, file)


def _read_change_limit(r: _Reader, i: int, raw: Any, names: set[str], spinup: float) -> ChangeLimit:
    """One ``[[change_limits]]`` entry: the largest rise and fall per step before today."""
    t = _Table(r, raw, f"change_limits[{i}]")
    sp = t.get("species", kind="str")
    if sp not in names:
        r.fail(f"change_limits[{i}].species", f"unknown species {sp!r}; declared species: {', '.join(sorted(names))}")
    t.path = base = f"change_limits.{sp}"
    up = t.number("up_at_most", None, low=1, low_open=True)
    down = t.number("down_at_most", None, low=1, low_open=True)
    if up is None and down is None:
        r.fail(f"{base}.up_at_most", "give up_at_most (e.g. 2: never more than doubling per step), "
                                     "down_at_most (e.g. 2: never below half per step), or both")
    step = t.number("step", 1.0, low=0, low_open=True)
    start = t.number("start", -0.5 * spinup, low=-spinup, high=0)
    end = t.number("end", 0.0, low=-spinup, high=0)
    if end - start < step - 1e-12:
        r.fail(f"{base}.end", f"the window [{start:g}, {end:g}] must hold at least one step of {step:g}")
    source = t.get("source", "", "str")
    t.done()
    return ChangeLimit(sp, up, down, step, start, end, source)


def _read_calibration(r: _Reader, raw: Any) -> CalibrationTable | None:
    """Read ``[calibration]`` (absent: None, every setting at its default)."""
    if raw is None:
        return None
    t = _Table(r, raw, "calibration")
    out = CalibrationTable(
        sampler=r.choice("calibration.sampler", t.get("sampler", "auto", "str"), SAMPLERS),
        min_acceptance=t.number("min_acceptance", DEFAULT_MIN_ACCEPTANCE, low=0, low_open=True, high=1),
        max_simulations=t.number("max_simulations", None, low=1, integer=True),
    )
    t.done()
    return out


def _read_seasons(r: _Reader, raw: Any) -> Seasons | None:
    """Read ``[seasons]`` (absent: None)."""
    if raw is None:
        return None
    t = _Table(r, raw, "seasons")
    out = Seasons(t.number("length", low=0, low_open=True), t.number("parts", 1, low=1, high=10_000, integer=True),
                  t.get("part_name", "part", "str"))
    t.done()
    return out


def _season_span(r: _Reader, f: str, parts: Any, seasons: Seasons | None) -> tuple[int, int]:
    """A ``[first, last]`` pair of season parts, checked against ``[seasons]``."""
    if seasons is None:
        r.fail(f, "scheduling by season needs a [seasons] table (length, parts)")
    if (not isinstance(parts, list) or len(parts) != 2
            or any(isinstance(x, bool) or not isinstance(x, int) or not 1 <= x <= seasons.parts for x in parts)):
        r.fail(f, f"must be [first, last]: two whole numbers from 1 to {seasons.parts} "
                  f"(the {seasons.part_name}s of a season; first > last wraps across the season's end)")
    return int(parts[0]), int(parts[1])


def _read_breeding(r: _Reader, raw: Any, f: str, seasons: Seasons | None):
    """A species' ``breeding_season``: a window ``{first, last, outside}`` or a sinusoid
    ``{amplitude, peak}``; returns (span, outside, amplitude, peak), all None/0 when absent."""
    if raw is None:
        return None, 0.0, None, None
    t = _Table(r, raw, f)
    if seasons is None:
        r.fail(f, "a breeding season needs a [seasons] table (length, parts)")
    if "amplitude" in t.data or "peak" in t.data:
        amplitude = t.quantity("amplitude", low=0, high=1)
        peak = t.number("peak", low=0.5, high=seasons.parts + 0.5)
        t.done()
        return None, 0.0, amplitude, peak
    if "first" not in t.data:
        r.fail(f, "give either first and last (a window, with outside) or amplitude and peak (a sinusoid)")
    span = _season_span(r, f, [t.get("first", kind="int"), t.get("last", kind="int")], seasons)
    outside = t.number("outside", 0.0, low=0, high=1)
    t.done()
    return span, outside, None, None


def _check_interference(r: _Reader, feeding: list[Feeding]):
    """Interference belongs to a consumer: one value for all of its Beddington–DeAngelis links,
    which cannot be mixed with Holling type II links (they share one handling denominator)."""
    for f in feeding:
        if f.response != "beddington-deangelis":
            continue
        mine = [g for g in feeding if g.consumer == f.consumer]
        if any(g.response == "holling2" for g in mine):
            r.fail("interactions", f"{f.consumer!r} mixes holling2 and beddington-deangelis responses; its links share "
                                   "one denominator, so use beddington-deangelis for all of them")
        if len({g.interference for g in mine if g.response == "beddington-deangelis"}) > 1:
            r.fail("interactions", f"{f.consumer!r} declares different interference values; interference is a property "
                                   "of the consumer: give the same number or parameter on each of its links")


def _check_stages(r: _Reader, species: tuple[Species, ...]):
    """Two life stages per species at most: a juvenile matures into an adult that is no juvenile."""
    by_name = {s.name: s for s in species}
    adults: set[str] = set()
    for s in species:
        if s.matures_into is None:
            continue
        f = f"species.{s.name}.matures_into"
        if s.matures_into not in by_name or s.matures_into == s.name:
            r.fail(f, f"must name another declared species (the adult stage); declared: {', '.join(sorted(by_name))}")
        if by_name[s.matures_into].matures_into is not None:
            r.fail(f, f"{s.matures_into!r} is itself a juvenile stage; a species has two stages at most")
        if s.matures_into in adults:
            r.fail(f, f"{s.matures_into!r} already has a juvenile stage; one per adult")
        adults.add(s.matures_into)

