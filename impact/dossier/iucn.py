"""Indicative reading of quasi-extinction probabilities against IUCN Red List criterion E.

IUCN (2012) *Red List Categories and Criteria*, version 3.1, 2nd ed., criterion E
("quantitative analysis showing the probability of extinction in the wild"):

* Critically Endangered: at least 50 % within 10 years or 3 generations, whichever is longer
  (up to a maximum of 100 years);
* Endangered: at least 20 % within 20 years or 5 generations, whichever is longer
  (up to a maximum of 100 years);
* Vulnerable: at least 10 % within 100 years.

The criterion speaks of extinction; an assessment only knows the probability of falling below
the case's quasi-extinction threshold, which is used here as a stand-in, so the reading is
indicative only.  Pure functions; no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

#: (category, minimum probability, years, generations or None); most threatened first.
CRITERION_E = (
    ("CR", 0.50, 10.0, 3.0),
    ("EN", 0.20, 20.0, 5.0),
    ("VU", 0.10, 100.0, None),
)
CATEGORY_NAMES = {"CR": "Critically Endangered", "EN": "Endangered", "VU": "Vulnerable"}
MAX_WINDOW_YEARS = 100.0

#: length of one time unit in years (Julian year of 365.25 days)
YEARS_PER_UNIT = {
    "year": 1.0, "years": 1.0, "yr": 1.0, "y": 1.0, "a": 1.0,
    "month": 1.0 / 12.0, "months": 1.0 / 12.0,
    "week": 7.0 / 365.25, "weeks": 7.0 / 365.25,
    "day": 1.0 / 365.25, "days": 1.0 / 365.25, "d": 1.0 / 365.25,
}

_TOL = 1e-9


def years_per_unit(time_unit: str) -> float | None:
    """Years in one case time unit, or None when the unit is not a calendar unit."""
    return YEARS_PER_UNIT.get(str(time_unit).strip().lower())


def window_years(years: float, generations: float | None, generation_time_years: float | None) -> float:
    """Criterion E time window: the longer of ``years`` and ``generations`` generations, capped at 100 years (IUCN 2012)."""
    w = float(years)
    if generations is not None and generation_time_years is not None:
        w = max(w, generations * float(generation_time_years))
    return min(w, MAX_WINDOW_YEARS)


@dataclass(frozen=True)
class Test:
    """One category threshold judged against the available horizons.

    Attributes
    ----------
    category : str
        ``"CR"``, ``"EN"`` or ``"VU"``.
    threshold : float
    window : float
        Criterion window in years.
    horizon : float or None
        Horizon (years) whose probability was used, None when none could be used.
    probability : float or None
        The quasi-extinction probability read at ``horizon``.
    met : bool or None
        True, False, or None when the horizons are too short to tell.
    """

    category: str
    threshold: float
    window: float
    horizon: float | None
    probability: float | None
    met: bool | None


@dataclass(frozen=True)
class Reading:
    """Indicative criterion E reading for one species under one option.

    ``category`` is ``"CR"``, ``"EN"``, ``"VU"``, ``"below VU"`` (every threshold judged and
    none met), ``"horizon too short"`` (no category met and at least one could not be judged)
    or ``"not applicable"`` (no generation time, or a time unit that is not a calendar unit).
    """

    category: str
    tests: tuple[Test, ...]
    note: str


def judge_threshold(probabilities: dict[float, float], threshold: float, window: float) -> tuple[float | None, float | None, bool | None]:
    """Judge one threshold from probabilities by horizon (years); returns (horizon, probability, met).

    The probability at the smallest horizon at or beyond the window is used.  When every horizon
    is shorter than the window, a threshold already reached at a shorter horizon still counts as
    met, since the probability of having fallen below a level by a time never decreases with the
    time; otherwise the threshold cannot be judged.
    """
    finite = {float(h): float(p) for h, p in probabilities.items() if p == p}
    longer = sorted(h for h in finite if h >= window - _TOL)
    if longer:
        h = longer[0]
        return h, finite[h], finite[h] >= threshold - _TOL
    shorter = sorted((h for h in finite if finite[h] >= threshold - _TOL))
    if shorter:
        h = shorter[0]
        return h, finite[h], True
    return None, None, None


def criterion_e(probabilities: dict[float, float], generation_time_years: float | None) -> Reading:
    """Indicative IUCN criterion E category from quasi-extinction probabilities by horizon (IUCN 2012, v3.1).

    Parameters
    ----------
    probabilities : dict of float -> float
        Quasi-extinction probability by horizon, horizons in years.
    generation_time_years : float or None
        Generation length in years; None makes the reading not applicable.
    """
    if generation_time_years is None or not generation_time_years > 0:
        return Reading("not applicable", (), "no generation time given")
    tests = []
    for cat, thr, years, gens in CRITERION_E:
        w = window_years(years, gens, generation_time_years)
        h, p, met = judge_threshold(probabilities, thr, w)
        tests.append(Test(cat, thr, w, h, p, met))
    unjudged = []
    for t in tests:
        if t.met:
            note = (f"at least {t.category}; {', '.join(unjudged)} could not be judged (horizon too short)"
                    if unjudged else "")
            return Reading(t.category, tuple(tests), note)
        if t.met is None:
            unjudged.append(t.category)
    if unjudged:
        return Reading("horizon too short", tuple(tests),
                       f"declared horizons are shorter than the window for {', '.join(unjudged)}")
    return Reading("below VU", tuple(tests), "")


def criterion_e_in_units(probabilities: dict[float, float], generation_time: float | None, time_unit: str) -> Reading:
    """Criterion E reading with horizons and generation time in the case's time unit (IUCN 2012, v3.1)."""
    k = years_per_unit(time_unit)
    if k is None:
        return Reading("not applicable", (), f"time unit '{time_unit}' is not convertible to years")
    if generation_time is None:
        return Reading("not applicable", (), "no generation time given")
    return criterion_e({h * k: p for h, p in probabilities.items()}, generation_time * k)
