"""Individuals at low numbers: the optional ``[individuals.SPECIES]`` tables of a case file.

A species whose abundance is a density may say how many individuals one unit of density is
(``per_unit``), or the area its density is spread over (``area``, in the area unit of its density:
400 for a density per hectare on a 400 ha island; the two are the same number, stated either
way), and the abundance, counted in individuals, below which its births and deaths are random
events rather than flows (``switch_below``). See :mod:`impact.engine.individuals`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from impact.case.reader import Reader, Table
from impact.case.types import Species

KEY = "individuals"
# the smallest switching abundance that can mean anything: below one individual nothing is counted
MIN_SWITCH = 1.0
# counting more than this one event at a time is neither needed (demographic noise is then small
# beside the mean) nor affordable
MAX_SWITCH = 1e6


@dataclass(frozen=True)
class Individuals:
    """How one species is counted in individuals at low numbers.

    Attributes
    ----------
    species : str
    per_unit : float
        Individuals in one unit of the species' abundance (its area when the abundance is a density).
    switch_below : float
        Below this many individuals (at a segment boundary) births and deaths are random events.
    stated_as : {"area", "per_unit"}
        Which key the case file used (for the check's and the report's wording).
    """

    species: str
    per_unit: float
    switch_below: float
    stated_as: str = "per_unit"

    def count(self, abundance):
        """Individuals in ``abundance`` (same shape)."""
        return abundance * self.per_unit

    def describe(self, unit: str) -> str:
        """One line on what was understood, e.g. for ``impact check``."""
        how = (f"spread over an area of {self.per_unit:g} (so 1 {unit} is {self.per_unit:g} individuals)"
               if self.stated_as == "area" else f"{self.per_unit:g} individuals per 1 {unit}")
        return (f"{self.species}: {how}; below {self.switch_below:g} individuals "
                f"({self.switch_below / self.per_unit:.4g} {unit}) its births and deaths are random events")


def read_individuals(r: Reader, raw: Any, species: tuple[Species, ...]) -> tuple[Individuals, ...]:
    """Every ``[individuals.SPECIES]`` table, in the order of the species (empty when absent)."""
    if raw is None:
        return ()
    t = Table(r, raw, KEY)
    by_name = {s.name: s for s in species}
    out = []
    for name in list(t.data):
        if name not in by_name:
            r.fail(f"{KEY}.{name}", f"{name!r} is not a declared species; species: {', '.join(by_name)}")
        out.append(read_one(r, t.get(name), name))
    t.done()
    order = {s.name: i for i, s in enumerate(species)}
    return tuple(sorted(out, key=lambda x: order[x.species]))


def read_one(r: Reader, raw: Any, name: str) -> Individuals:
    """One ``[individuals.SPECIES]`` table: exactly one of ``area`` and ``per_unit``, and ``switch_below``."""
    base = f"{KEY}.{name}"
    t = Table(r, raw, base)
    area = t.number("area", None, low=0, low_open=True)
    per_unit = t.number("per_unit", None, low=0, low_open=True)
    if (area is None) == (per_unit is None):
        r.fail(base, "give exactly one of 'area' (the area the density is spread over, in the density's "
                     "area unit) and 'per_unit' (individuals in one unit of abundance)")
    switch = t.number("switch_below", low=MIN_SWITCH, high=MAX_SWITCH)
    t.done()
    k = area if area is not None else per_unit
    return Individuals(name, float(k), float(switch), "area" if area is not None else "per_unit")
