"""The case as frozen dataclasses: what every later stage receives, validated once.

A numeric field holds either a number (a fixed value) or the name of a declared parameter (an
uncertain value with a prior, unit and source): :data:`Quantity`. Reading and checking a case
file is :mod:`impact.case`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from impact.case.priors import Fixed, Prior

Quantity = float | str  # a number, or the name of a parameter in [parameters]

GROWTH_FORMS = ("logistic", "exponential", "none")
# Allee effects (impact.model.terms.mate_finding, strong_allee, predator_dilution): births × N/(N + θ),
# logistic growth × (N/A − 1), or a loss D·N/(N + h) to a generalist predator with a saturating response
ALLEE_FORMS = ("none", "mate-finding", "strong", "predator-dilution")
RESPONSES = ("holling1", "holling2", "holling3", "beddington-deangelis")
INTERACTION_KINDS = ("predation", "scavenging", "competition", "mutualism", "alternative-food")
OTHER_FOOD = "'s other food"  # a consumer's constant alternative food is named CONSUMER + this
# how a beneficiary depends on its mutualist partner: a bonus on births, or no births without it
DEPENDENCES = ("facultative", "obligate")
# what the assessment wants for a species: options are meant to remove or reduce a target,
# to spare a protected species; every other species is watched for side effects
ROLES = ("target", "protected", "other")
# what an objective looks at, per member, by its time
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
    allee: str = "none"  # an Allee effect in growth: one of ALLEE_FORMS
    allee_threshold: Quantity | None = None  # θ (mate finding), A (strong) or h (predator dilution), species' unit
    dilution_rate: Quantity | None = None  # D of predator dilution: most removals per time unit, species' unit


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

    The objective's *event* is, per member: the abundance at ``time`` lying below (or
    above) ``level`` for ``measure = "abundance"``; falling below the species'
    quasi-extinction level by ``time``; exceeding its outbreak level by ``time``.
    ``requirement`` says what counts as met: the event's chance under the option at least /
    at most ``bound``, or its paired change against the baseline (option minus baseline, on
    the same members) at most / at least ``bound``.
    """

    name: str
    species: str
    measure: str
    time: float
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
    times: tuple[float, ...]
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
    # structural doubts (impact.case.structures.Structures); None: one web, the interactions as written
    structures: "Structures | None" = None
    studies: tuple = ()  # candidate studies (impact.case.studies.Study)
    outcome_values: object = None  # impact.case.studies.OutcomeValues or None
    weighing: object = None  # impact.case.studies.Weighing or None
    individuals: tuple = ()  # species counted in individuals at low numbers (impact.case.individuals)
    surveillance: tuple = ()  # impact.case.surveillance.Surveillance, one per species at most

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


def schedule_text(case: Case, iv: Intervention) -> str:
    """How an intervention is scheduled by season, in words ("" when it is not)."""
    if iv.season_parts is None or case.seasons is None:
        return ""
    first, last = iv.season_parts
    return f"only in {case.seasons.part_name}s {first}–{last} of every season"
