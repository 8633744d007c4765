"""Reading a case file's tables into :mod:`impact.case.types` dataclasses: the TOML table reader that
refuses unknown keys and names every field, and one reader per core table (species, interactions,
interventions, options, risk) with the checks that tie them together."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from impact.case.types import (ALLEE_FORMS, ARRIVAL_KINDS, CARRION, DEFAULT_MATERIAL_CHANGE, DEFAULT_MATERIAL_RISK,
    DEFAULT_MIN_MEMBERS, DEPENDENCES, GROWTH_FORMS, INTERACTION_KINDS, INTERVENTION_KINDS, KIND_ALIASES,
    OTHER_FOOD, RESPONSES, ROLES, SPAN_KINDS, Carrion, Competition, Feeding, Intervention, Mutualism, Observation,
    Option, Parameter, Quantity, Risk, Seasons, Species)
from impact.errors import CaseError
from impact.case.priors import DISTRIBUTIONS, prior_problems


# parts of seasons over the spin-up and horizon: every edge of a breeding or scheduling window starts
# a new integration segment, so this bounds the work a seasonal case can ask for (common practice)
MAX_SEASON_PARTS = 100_000


class Table:
    """A TOML table being consumed: every key must be read, leftovers are typos."""

    def __init__(self, reader: "Reader", data: Any, path: str):
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


class Reader:
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


def unique(reader: Reader, items, key: str, what: str):
    seen = set()
    for i, item in enumerate(items):
        name = getattr(item, key)
        if name in seen:
            reader.fail(f"{what}[{i}].{key}", f"duplicate name {name!r}; names must be unique")
        seen.add(name)


def read_parameter(r: Reader, name: str, data: Any) -> Parameter:
    t = Table(r, data, f"parameters.{name}")
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


def read_meta(r: Reader, top: Table) -> dict:
    """The ``[case]`` table: title, time, ensemble and integration settings, as keyword arguments of Case."""
    meta = Table(r, top.get("case"), "case")
    out = dict(title=meta.get("title", kind="str"), analyst=meta.get("analyst", "", "str"),
               description=meta.get("description", "", "str"), invented=meta.get("invented", False, "bool"),
               time_unit=meta.get("time_unit", kind="str"), horizon=meta.number("horizon", low=0, low_open=True),
               output_step=meta.number("output_step", 1.0, low=0, low_open=True),
               spinup=meta.number("spinup", 0.0, low=0))
    out["members"] = meta.number("members", 1000, low=1, integer=True)
    out["max_draws"] = meta.number("max_draws", 20 * out["members"], low=out["members"], integer=True)
    out["seed"] = meta.number("seed", 0, low=0, integer=True)
    out["rtol"] = meta.number("rtol", 1e-6, low=0, low_open=True, high=0.1)
    out["atol"] = meta.number("atol", 1e-9, low=0, low_open=True)
    out["notes"] = tuple(meta.get("assumptions", [], "list"))
    meta.done()
    if any(not isinstance(n, str) for n in out["notes"]):
        r.fail("case.assumptions", "must be a list of text strings")
    if out["output_step"] > out["horizon"]:
        r.fail("case.output_step", f"must not exceed the horizon ({out['horizon']:g})")
    return out


def read_parameters(r: Reader, raw: Any) -> tuple[Parameter, ...]:
    """The ``[parameters]`` table: every named parameter with its prior."""
    if not isinstance(raw, dict):
        r.fail("parameters", "must be a table of named parameters")
    return tuple(read_parameter(r, n, v) for n, v in raw.items())


def read_one_species(r: Reader, i: int, raw: Any, seasons: Seasons | None) -> Species:
    """One ``[[species]]`` entry."""
    t = Table(r, raw, f"species[{i}]")
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
    if not present and initial != 0.0:
        r.fail(f"species.{name}.initial", "a species absent today (present = false) starts at 0; set initial = 0 or "
                                          "leave it out (a release or first arrival brings it)")
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
    breeding, outside, amplitude, peak = read_breeding(r, t.get("breeding_season", None, "any"),
                                                       f"species.{name}.breeding_season", seasons)
    adult = t.get("matures_into", None, "str")
    maturation = 0.0
    if adult is not None:
        if growth != "none":
            r.fail(f"species.{name}.growth", "a juvenile stage (matures_into) does not breed: growth must be "
                                             "\"none\"; its numbers come from the births of the stage it matures into")
        maturation = t.quantity("maturation_rate", low=0, low_open=True)
    allee, threshold, dilution = read_allee(r, t, name, growth, k, adult)
    t.done()
    return Species(name, growth, gr, k, mortality, initial, present, noise, qe, outbreak, gen, unit, cy, desc,
                   role, material, crowding, breeding, outside, amplitude, peak, adult, maturation, allee, threshold,
                   dilution)


def read_allee(r: Reader, t: Table, name: str, growth: str, k: Quantity | None, adult: str | None):
    """A species' ``allee`` form, ``allee_threshold`` (θ of mate finding, A of a strong Allee effect, h
    of predator dilution) and ``dilution_rate`` (D of predator dilution, else None)."""
    base = f"species.{name}"
    allee = r.choice(f"{base}.allee", t.get("allee", "none", "str"), ALLEE_FORMS)
    if "dilution_rate" in t.data and allee != "predator-dilution":
        r.fail(f"{base}.dilution_rate", f"is given with allee = {allee!r}; it is the most a generalist predator "
                                        "removes per time unit under allee = \"predator-dilution\" (set that, or "
                                        "remove it)")
    if allee == "none":
        if "allee_threshold" in t.data:
            r.fail(f"{base}.allee_threshold", "is given without an Allee effect; set allee = \"mate-finding\", "
                                              "\"strong\" or \"predator-dilution\", or remove it")
        return allee, None, None
    if allee == "predator-dilution":
        # a loss to predation, not a change in breeding: it acts on any growth form, a juvenile
        # stage included (juveniles are eaten too; only the breeding forms need an adult)
        return allee, t.quantity("allee_threshold", low=0, low_open=True), t.quantity("dilution_rate", low=0)
    if adult is not None:
        r.fail(f"{base}.allee", "a juvenile stage (matures_into) does not breed; declare the Allee effect on the "
                                "adult stage")
    if allee == "strong" and growth != "logistic":
        r.fail(f"{base}.allee", "a strong Allee effect multiplies logistic growth r·N·(1 − N/K) by (N/A − 1); "
                                f"{name!r} has growth {growth!r} (use growth = \"logistic\", or allee = "
                                "\"mate-finding\", which acts on any births)")
    threshold = t.quantity("allee_threshold", low=0, low_open=True)
    if allee == "strong" and isinstance(threshold, float) and isinstance(k, float) and threshold >= k:
        r.fail(f"{base}.allee_threshold", f"must lie below the carrying capacity ({k:g}): a strong Allee threshold "
                                          f"A ≥ K leaves no stable population, got {threshold:g}")
    return allee, threshold, None


def read_species(r: Reader, raw: list, seasons: Seasons | None) -> tuple[Species, ...]:
    """Every ``[[species]]`` entry, with unique names and at most two life stages each."""
    if not raw:
        r.fail("species", "at least one species is required")
    species = tuple(read_one_species(r, i, x, seasons) for i, x in enumerate(raw))
    unique(r, species, "name", "species")
    check_stages(r, species)
    return species


def species_ref(r: Reader, names: set[str], f: str, v: str, allow_carrion: bool = False) -> str:
    """``v`` if it names a declared species (or the carrion pool where allowed), else a CaseError at ``f``."""
    if v == CARRION and allow_carrion:
        return v
    if v not in names:
        allowed = sorted(names) + ([CARRION] if allow_carrion else [])
        r.fail(f, f"unknown species {v!r}; declared species: {', '.join(allowed)}")
    return v


def read_feeding(r: Reader, t: Table, i: int, kind: str, names: set[str], feeding: list) -> Feeding:
    """A predation, scavenging or alternative-food interaction."""
    who = {"predation": "predator", "scavenging": "scavenger", "alternative-food": "consumer"}[kind]
    consumer = species_ref(r, names, f"interactions[{i}].{who}", t.get(who, kind="str"))
    density = None
    if kind == "predation":
        resource = species_ref(r, names, f"interactions[{i}].prey", t.get("prey", kind="str"))
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
    return Feeding(kind, consumer, resource, response, attack, handling, eff, interference, density)


def read_mutualism(r: Reader, t: Table, i: int, species: tuple[Species, ...], mutualism: list) -> Mutualism:
    """A facultative or obligate mutualism."""
    names = {s.name for s in species}
    ben = species_ref(r, names, f"interactions[{i}].beneficiary", t.get("beneficiary", kind="str"))
    par = species_ref(r, names, f"interactions[{i}].partner", t.get("partner", kind="str"))
    if par == ben:
        r.fail(f"interactions[{i}].partner", "a species cannot be its own mutualist partner")
    target = next(s for s in species if s.name == ben)
    if target.growth == "none":
        r.fail(f"interactions[{i}].beneficiary", f"a mutualism acts on births at growth_rate; {ben!r} has "
                                                 "growth = \"none\" (give it logistic or exponential growth)")
    if target.growth == "exponential" and not isinstance(target.growth_rate, str) and target.growth_rate <= 0:
        r.fail(f"interactions[{i}].beneficiary", f"a mutualism acts on births at growth_rate; {ben!r} declines "
                                                 f"(growth_rate {target.growth_rate:g} <= 0), so it has no births "
                                                 "to act on")
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
    return Mutualism(ben, par, mb, hs, dep == "obligate")


def read_interactions(r: Reader, raw: list, species: tuple[Species, ...]):
    """Every ``[[interactions]]`` entry: (feeding, competition, mutualism) lists."""
    names = {s.name for s in species}
    feeding, competition, mutualism = [], [], []
    for i, item in enumerate(raw):
        t = Table(r, item, f"interactions[{i}]")
        if "kind" in t.data and "type" in t.data:
            r.fail(f"interactions[{i}].type", "give the interaction's kind once: `kind` (`type` is its older alias)")
        key = "type" if "type" in t.data else "kind"
        kind = r.choice(f"interactions[{i}].{key}", t.get(key, kind="str"), INTERACTION_KINDS)
        if kind in ("predation", "scavenging", "alternative-food"):
            feeding.append(read_feeding(r, t, i, kind, names, feeding))
        elif kind == "competition":
            sp = species_ref(r, names, f"interactions[{i}].species", t.get("species", kind="str"))
            comp = species_ref(r, names, f"interactions[{i}].competitor", t.get("competitor", kind="str"))
            if next(s for s in species if s.name == sp).growth != "logistic":
                r.fail(f"interactions[{i}].species", f"competition acts on logistic growth; {sp!r} is not logistic")
            competition.append(Competition(sp, comp, t.quantity("coefficient", low=0)))
        else:
            mutualism.append(read_mutualism(r, t, i, species, mutualism))
        t.done()
    check_interference(r, feeding)
    return feeding, competition, mutualism


def read_carrion(r: Reader, top: Table, feeding: list) -> Carrion | None:
    """The ``[carrion]`` table (needed by a scavenging interaction)."""
    carrion = None
    if "carrion" in top.data:
        t = Table(r, top.get("carrion"), "carrion")
        carrion = Carrion(t.quantity("decay_rate", low=0, low_open=True), t.number("initial", 0.0, low=0))
        t.done()
    if any(f.kind == "scavenging" for f in feeding) and carrion is None:
        r.fail("carrion", "a scavenging interaction needs a [carrion] table with decay_rate")
    return carrion


def read_observed(r: Reader, raw: list, names: set[str]) -> tuple[Observation, ...]:
    """Every ``[[observed]]`` range of today's abundance."""
    observed = []
    for i, item in enumerate(raw):
        t = Table(r, item, f"observed[{i}]")
        sp = species_ref(r, names, f"observed[{i}].species", t.get("species", kind="str"))
        lo = t.number("low", low=0)
        hi = t.number("high", low=0)
        if not lo < hi:
            r.fail(f"observed[{i}].high", f"must be greater than low ({lo:g}); bounds reversed or equal")
        observed.append(Observation(sp, lo, hi, t.get("source", "", "str")))
        t.done()
    return tuple(observed)


def span_terms(r: Reader, t: Table, base: str, kind: str, target: Species, horizon: float,
               seasons: Seasons | None) -> tuple[float, float, dict]:
    """Start, end and intensities of an intervention acting over a span (optionally by season)."""
    start = t.number("start", 0.0, low=0, high=horizon)
    end = t.number("end", horizon, low=0, high=horizon)
    if end <= start:
        r.fail(f"{base}.end", f"must be after start ({start:g}); an intervention over no time would never act")
    kw: dict[str, Any] = {}
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
            r.fail(f"{base}.species", f"a carrying-capacity change scales a carrying capacity; {target.name!r} "
                                      "is not logistic")
        kw["factor"] = t.quantity("factor", low=0, low_open=True)
    parts = t.get("season_parts", None, "list")
    if parts is not None:
        first, last = season_span(r, f"{base}.season_parts", parts, seasons)
        kw["windows"] = seasons.windows(first, last, start, end)
        if not kw["windows"]:
            r.fail(f"{base}.season_parts", f"no {seasons.part_name} {first}–{last} of a season falls between start "
                                           f"({start:g}) and end ({end:g}), so the intervention would never act")
        kw["season_parts"] = (first, last)
    return start, end, kw


def cull_terms(r: Reader, t: Table, base: str, horizon: float, seasons: Seasons | None) -> tuple[float, float, dict]:
    """Cull times (listed, or the start of a season part in every season) and the fraction culled."""
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
        first, _ = season_span(r, f"{base}.season_part", [part, part], seasons)
        times = seasons.starts_of_part(first, t.number("start", 0.0, low=0, high=horizon),
                                       t.number("end", horizon, low=0, high=horizon))
        if not times:
            r.fail(f"{base}.season_part", "no season reaches that part between start and end")
    times = tuple(sorted(float(x) for x in times))
    kw = dict(times=times, fraction=t.quantity("fraction", low=0, high=1),
              carcasses_to_carrion=t.get("carcasses_to_carrion", False, "bool"))
    return times[0], times[-1], kw


def read_intervention(r: Reader, i: int, raw: Any, species: tuple[Species, ...], horizon: float, time_unit: str,
                      seasons: Seasons | None) -> Intervention:
    """One ``[[interventions]]`` entry."""
    t = Table(r, raw, f"interventions[{i}]")
    name = t.get("name", kind="str")
    t.path = base = f"interventions.{name}"
    given = t.get("kind", kind="str")
    kind = r.choice(f"{base}.kind", KIND_ALIASES.get(given, given), INTERVENTION_KINDS + tuple(KIND_ALIASES))
    sp = species_ref(r, {s.name for s in species}, f"{base}.species", t.get("species", kind="str"))
    target = next(s for s in species if s.name == sp)
    if kind in SPAN_KINDS:
        start, end, kw = span_terms(r, t, base, kind, target, horizon, seasons)
    elif kind == "pulse-cull":
        start, end, kw = cull_terms(r, t, base, horizon, seasons)
    elif kind == "eradication":
        start = end = t.number("time")
        kw = dict(failure_probability=t.quantity("failure_probability", 0.0, low=0, high=1),
                  residual_fraction=t.quantity("residual_fraction", 0.0, low=0, high=1))
    else:  # release or first arrival
        if kind == "first-arrival" and target.present:
            r.fail(f"{base}.species", f"a first arrival brings a species absent today; {sp!r} is declared present "
                                      "(use kind = \"release\" to add to a present population, or set present = false)")
        start = end = t.number("time")
        kw = dict(amount=t.quantity("amount", low=0, low_open=True))
    for label, v in (("start" if kind not in ("eradication", *ARRIVAL_KINDS) else "time", start), ("end", end)):
        if not 0 <= v <= horizon:
            r.fail(f"{base}.{label}" if kind != "pulse-cull" else f"{base}.times",
                   f"{v:g} lies outside the assessment period [0, {horizon:g}] {time_unit}")
    if end < start:
        r.fail(f"{base}.end", f"must not be before start ({start:g})")
    desc = t.get("description", "", "str")
    t.done()
    return Intervention(name, kind, sp, start, end, description=desc, **kw)


def read_options(r: Reader, raw: list, iv_names: set[str]) -> tuple[Option, ...]:
    """Every ``[[options]]`` entry: a name and the interventions it combines, each once."""
    options = []
    for i, item in enumerate(raw):
        t = Table(r, item, f"options[{i}]")
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
                r.fail(f"options.{name}.interventions",
                       f"unknown intervention {iv!r}; declared: {', '.join(sorted(iv_names)) or 'none'}")
            if iv in ivs[:k]:
                r.fail(f"options.{name}.interventions", f"lists {iv!r} twice; an intervention applies once per option "
                                                        "(declare a second intervention to apply more)")
        options.append(Option(name, tuple(ivs), t.get("description", "", "str")))
        t.done()
    options = tuple(options)
    unique(r, options, "name", "options")
    if not options:
        r.fail("options", "at least one intervention option is required to compare with the baseline")
    return options


def read_risk(r: Reader, raw: Any, horizon: float) -> Risk:
    """The ``[risk]`` table: horizons, recovery, confidence and the levels of a material change."""
    rt = Table(r, raw, "risk")
    horizons = rt.get("horizons", [horizon], "list")
    if not horizons or any(isinstance(h, bool) or not isinstance(h, (int, float)) or not 0 < h <= horizon
                           for h in horizons):
        r.fail("risk.horizons", f"must be a non-empty list of times in (0, {horizon:g}]")
    risk = Risk(
        tuple(sorted(float(h) for h in horizons)),
        rt.number("recovery_fraction", 0.8, low=0, low_open=True, high=1),
        rt.number("confidence", 0.95, low=0.5, high=0.999),
        rt.number("material_change", DEFAULT_MATERIAL_CHANGE, low=0, low_open=True),
        rt.number("material_risk", DEFAULT_MATERIAL_RISK, low=0, low_open=True, high=1),
        rt.number("min_members", DEFAULT_MIN_MEMBERS, low=1, integer=True),
    )
    rt.done()
    return risk


def check_references(r: Reader, parameters: tuple[Parameter, ...]):
    """Every field that names a parameter names a declared one whose prior support fits the field."""
    pnames = {p.name: p for p in parameters}
    for f, ref, low, high, low_open in r.references:
        if ref not in pnames:
            r.fail(f, f"refers to parameter {ref!r}, which is not declared in [parameters]; declared: "
                      f"{', '.join(sorted(pnames)) or 'none'}")
        prior = pnames[ref].prior
        lo_s, hi_s = prior.support()
        # an end the distribution never reaches (a lognormal's 0) meets an open bound (> 0)
        reaches_low = not prior.open_ends[0]
        if low is not None and (lo_s < low or (lo_s == low and low_open and reaches_low)):
            r.fail(f, f"parameter {ref!r} can take values down to {lo_s:g}, but this field must be "
                      f"{'>' if low_open else '>='} {low:g}")
        if high is not None and hi_s > high:
            r.fail(f, f"parameter {ref!r} can take values up to {hi_s:g}, but this field must be <= {high:g}")


def read_seasons(r: Reader, raw: Any, span: float) -> Seasons | None:
    """Read ``[seasons]`` (absent: None); ``span`` is the spin-up plus the horizon."""
    if raw is None:
        return None
    t = Table(r, raw, "seasons")
    out = Seasons(t.number("length", low=0, low_open=True), t.number("parts", 1, low=1, high=10_000, integer=True),
                  t.get("part_name", "part", "str"))
    t.done()
    if out.parts * span / out.length > MAX_SEASON_PARTS:
        r.fail("seasons.length", f"{out.parts} parts per season of {out.length:g} make about "
                                 f"{out.parts * span / out.length:.3g} parts over the spin-up and horizon "
                                 f"({span:g}); at most {MAX_SEASON_PARTS:,} are allowed (each edge of a part where "
                                 f"something changes is a step of the integration): use longer seasons or fewer parts")
    return out


def season_span(r: Reader, f: str, parts: Any, seasons: Seasons | None) -> tuple[int, int]:
    """A ``[first, last]`` pair of season parts, checked against ``[seasons]``."""
    if seasons is None:
        r.fail(f, "scheduling by season needs a [seasons] table (length, parts)")
    if (not isinstance(parts, list) or len(parts) != 2
            or any(isinstance(x, bool) or not isinstance(x, int) or not 1 <= x <= seasons.parts for x in parts)):
        r.fail(f, f"must be [first, last]: two whole numbers from 1 to {seasons.parts} "
                  f"(the {seasons.part_name}s of a season; first > last wraps across the season's end)")
    return int(parts[0]), int(parts[1])


def read_breeding(r: Reader, raw: Any, f: str, seasons: Seasons | None):
    """A species' ``breeding_season``: a window ``{first, last, outside}`` or a sinusoid
    ``{amplitude, peak}``; returns (span, outside, amplitude, peak), all None/0 when absent."""
    if raw is None:
        return None, 0.0, None, None
    t = Table(r, raw, f)
    if seasons is None:
        r.fail(f, "a breeding season needs a [seasons] table (length, parts)")
    if "amplitude" in t.data or "peak" in t.data:
        amplitude = t.quantity("amplitude", low=0, high=1)
        if amplitude == 0.0:
            r.fail(f"{f}.amplitude", "0 makes births the same all season; give an amplitude in (0, 1] or a "
                                     "parameter, or leave breeding_season out")
        peak = t.number("peak", low=0.5, high=seasons.parts + 0.5)
        t.done()
        return None, 0.0, amplitude, peak
    if "first" not in t.data:
        r.fail(f, "give either first and last (a window, with outside) or amplitude and peak (a sinusoid)")
    span = season_span(r, f, [t.get("first", kind="int"), t.get("last", kind="int")], seasons)
    outside = t.number("outside", 0.0, low=0, high=1)
    first, last = span
    if (last - first) % seasons.parts == seasons.parts - 1:
        r.fail(f"{f}.last", f"{seasons.part_name}s {first} to {last} cover the whole season, so the breeding season "
                            "would change nothing; give the parts with births, or leave breeding_season out")
    if outside == 1.0:
        r.fail(f"{f}.outside", "1 makes births the same in and out of the breeding season; give a level in [0, 1) "
                               "(the births multiplier outside it), or leave breeding_season out")
    t.done()
    return span, outside, None, None


def check_interference(r: Reader, feeding: list[Feeding]):
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


def check_stages(r: Reader, species: tuple[Species, ...]):
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
        if by_name[s.matures_into].allee == "strong":
            r.fail(f"species.{s.matures_into}.allee", "a strong Allee effect multiplies a species' own logistic "
                                                      "growth; an adult with a juvenile stage gains by maturation "
                                                      "instead (use allee = \"mate-finding\" on it)")
