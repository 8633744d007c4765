"""Reading a case's ``[[surveillance]]`` entries: when a target counts as gone, how well one survey
detects it, the confidence at which its eradication may be declared, and its arrivals from outside.

An eradication or control is declared as effort by the interventions that already exist: a
``press-harvest`` is a removal rate per individual per time unit over [start, end], a ``pulse-cull``
removes a fraction at each pulse. Its outcome is then read from the simulated numbers, member by
member (:mod:`impact.risk.eradication`), instead of being declared as a failure chance.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from impact.case.reader import Reader, Table
from impact.case.types import Quantity, Species


@dataclass(frozen=True)
class Surveillance:
    """One species' surveillance after its eradication, and its arrivals from outside.

    Attributes
    ----------
    species : str
    gone_below : float
        Abundance (in the species' unit) below which the species counts as gone: e.g. one
        individual on the whole site, as a density.
    detection : Quantity
        Chance that one survey detects the species when it is present (a number or a parameter).
    confidence : float
        Posterior chance of absence at which eradication may be declared.
    survey : str
        What one survey is, in words (for the reading).
    arrival_rate : Quantity
        Individuals arriving from outside per time unit, a Poisson process (0: none).
    establishment : Quantity
        Chance that one arrival founds a population again.
    source : str
    """

    species: str
    gone_below: float
    detection: Quantity
    confidence: float
    survey: str
    arrival_rate: Quantity
    establishment: Quantity
    source: str


def read_surveillance(r: Reader, i: int, raw: Any, species: tuple[Species, ...], confidence: float) -> Surveillance:
    """One ``[[surveillance]]`` entry (``confidence`` defaults to the ``[risk]`` confidence)."""
    t = Table(r, raw, f"surveillance[{i}]")
    name = t.get("species", kind="str")
    by_name = {s.name: s for s in species}
    if name not in by_name:
        r.fail(f"surveillance[{i}].species", f"unknown species {name!r}; declared species: {', '.join(sorted(by_name))}")
    t.path = base = f"surveillance.{name}"
    sp = by_name[name]
    if not sp.present:
        r.fail(f"{base}.species", f"{name!r} is absent today; surveillance judges the removal of a species present today")
    gone = t.number("gone_below", low=0, low_open=True)
    if gone >= sp.quasi_extinction > 0:
        r.fail(f"{base}.gone_below", f"must lie below the species' quasi-extinction level ({sp.quasi_extinction:g} "
                                     f"{sp.unit}): gone is the last individual removed, got {gone:g}")
    detection = t.quantity("detection", low=0, low_open=True, high=1)
    level = t.number("confidence", confidence, low=0, low_open=True)
    if level >= 1:
        r.fail(f"{base}.confidence", f"must be below 1 (no number of imperfect surveys proves absence), got {level:g}")
    survey = t.get("survey", "survey", "str")
    rate = t.quantity("arrival_rate", 0.0, low=0)
    establishment = t.quantity("establishment", 1.0, low=0, high=1)
    source = t.get("source", "", "str")
    t.done()
    return Surveillance(name, gone, detection, level, survey, rate, establishment, source)
