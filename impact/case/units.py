"""Units of a case's parameters against the fields they feed (warnings, never errors).

Units are free text in a case file; what can be compared is the time word of a rate against the
case's time unit, and an abundance's unit against its species' declared unit (README: the units
of the model's rates).
"""

from __future__ import annotations

import re

from impact.case import Case, Intervention, Mutualism, Species

# Dimension of every numeric field with respect to time: a rate (per time unit), a duration, or
# neither. Used to compare the time word in a parameter's declared unit with the case's time unit.
PER_TIME_FIELDS = ("growth_rate", "mortality", "rate", "decay_rate", "maturation_rate", "attack_rate", "arrival_rate",
                   "crowding_mortality", "dilution_rate")
TIME_FIELDS = ("handling_time",)
_TIME_WORDS = {"second": "second", "minute": "minute", "hour": "hour", "day": "day", "week": "week",
               "month": "month", "year": "year", "yr": "year", "annum": "year", "decade": "decade"}


def _time_words(text: str) -> set[str]:
    """Time units named in a unit string ("1/(cat·year)" -> {"year"}), singular."""
    found = set()
    for word in re.findall(r"[A-Za-z]+", text.lower()):
        stem = word[:-1] if word.endswith("s") and word[:-1] in _TIME_WORDS else word
        if stem in _TIME_WORDS:
            found.add(_TIME_WORDS[stem])
    return found


def _plain(unit: str) -> str:
    return "".join(unit.lower().split())


def _abundance_of(case: Case, item, name: str) -> "Species | None":
    """The species whose abundance unit a field is in (None for fields of other dimensions)."""
    if isinstance(item, Species) and name in ("carrying_capacity", "initial", "allee_threshold"):
        return item
    if isinstance(item, Mutualism) and name == "half_saturation":
        return case.species_by_name(item.partner)
    if isinstance(item, Intervention) and name in ("sterile_density", "amount"):
        return case.species_by_name(item.species)
    return None


def unit_warnings(case: Case) -> tuple[str, ...]:
    """Parameters whose declared unit disagrees with the field they feed.

    A rate's or a handling time's unit must name the case's ``time_unit`` (when that is a known
    time word) and no other; a field without time in its dimension (efficiencies, coefficients,
    abundances, fractions) must name none; an abundance (carrying capacity, initial abundance, a
    partner's half-saturation, a sterile density, an amount released) must be in its species'
    declared unit. Units are free text, so this is a warning, not an error.
    """
    own = _time_words(case.time_unit)
    params = {p.name: p for p in case.parameters}
    items = [(f"species.{s.name}", s) for s in case.species]
    items += [(f"interactions ({f.kind} of {f.consumer} on {f.resource})", f) for f in case.feeding]
    items += [(f"interactions (competition on {c.species})", c) for c in case.competition]
    items += [(f"interactions (mutualism of {u.beneficiary})", u) for u in case.mutualism]
    items += [(f"interventions.{iv.name}", iv) for iv in case.interventions]
    items += [(f"surveillance.{v.species}", v) for v in case.surveillance]
    if case.carrion is not None:
        items.append(("carrion", case.carrion))
    out, seen = [], set()
    for label, item in items:
        for f in item.__dataclass_fields__.values():
            ref = getattr(item, f.name)
            if "Quantity" not in str(f.type) or not isinstance(ref, str) or ref not in params:  # a structure switch
                continue
            words = _time_words(params[ref].unit)
            timed = f.name in PER_TIME_FIELDS or f.name in TIME_FIELDS
            whose = _abundance_of(case, item, f.name)
            if not params[ref].unit.strip():
                if not timed and whose is None:
                    continue  # a dimensionless field: no unit is a fair declaration
                expected = (f"per {case.time_unit}" if f.name in PER_TIME_FIELDS else
                            case.time_unit if timed else f"{whose.name}'s unit {whose.unit!r}")
                problem = f"is missing; the field is in {expected}"
            elif timed and own and words and words != own:
                problem = f"names {', '.join(sorted(words))}, but the case's time unit is {case.time_unit!r}"
            elif not timed and words:
                problem = "names a time unit, but this field has no time in its dimension"
            elif whose is not None and _plain(params[ref].unit) != _plain(whose.unit):
                problem = f"is not {whose.name}'s unit {whose.unit!r}"
            else:
                continue
            if (ref, f.name) not in seen:
                seen.add((ref, f.name))
                out.append(f"parameters.{ref}.unit: {params[ref].unit!r} {problem} (it feeds {label}.{f.name}; "
                           "see README, the units of the model's rates)")
    return tuple(out)
