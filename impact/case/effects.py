"""Declarations a case may make that would silently change nothing, refused naming the field: a
control of births or a breeding season on a species without births (or on a juvenile stage, which
does not breed), and carcasses sent to a carrion pool the case does not have."""

from __future__ import annotations

from impact.case.reader import Reader
from impact.case.types import Carrion, Feeding, Species


def breeds(s: Species, feeding: list[Feeding]) -> bool:
    """Whether ``s`` can have births for a control of births to act on: a species that is no juvenile
    stage, with logistic growth, exponential growth whose rate is not a fixed number <= 0, or a link
    on which it feeds with an efficiency that is not a fixed 0 (its food turns into births)."""
    if s.matures_into is not None:
        return False
    if s.growth == "logistic" or (s.growth == "exponential" and (isinstance(s.growth_rate, str) or s.growth_rate > 0)):
        return True
    return any(f.consumer == s.name and (isinstance(f.efficiency, str) or f.efficiency > 0) for f in feeding)


def _no_births(s: Species, what: str) -> str:
    if s.matures_into is not None:
        return (f"{s.name!r} is a juvenile stage: it does not breed, so {what} would change nothing; "
                f"give it to the adult stage {s.matures_into!r}")
    return (f"{s.name!r} has no births ({s.growth} growth and no food turned into births), so {what} would "
            "change nothing; give it logistic or exponential growth, or a food it turns into births")


def check_effects(r: Reader, species: tuple[Species, ...], feeding: list[Feeding], carrion: Carrion | None,
                  interventions) -> None:
    """Refuse declarations that would silently change nothing: a control of births or a breeding
    season on a species without births, carcasses sent to a carrion pool the case does not have."""
    by_name = {s.name: s for s in species}
    for s in species:
        if (s.breeding_season is not None or s.breeding_amplitude is not None) and not breeds(s, feeding):
            r.fail(f"species.{s.name}.breeding_season", _no_births(s, "a breeding season"))
    for iv in interventions:
        base = f"interventions.{iv.name}"
        if iv.kind in ("sterile-release", "fertility-control") and not breeds(by_name[iv.species], feeding):
            r.fail(f"{base}.species", _no_births(by_name[iv.species], f"a {iv.kind}"))
        if iv.carcasses_to_carrion and carrion is None:
            r.fail(f"{base}.carcasses_to_carrion", "sends carcasses to the carrion pool, but the case has no "
                                                   "[carrion] table (add one with decay_rate, or leave this out)")
