"""Food-web layout by trophic level."""

from __future__ import annotations

import pytest

from impact.manifest import (CaseRecord, Counts, InteractionRecord, Judgement, Manifest, OptionRecord,
                             SpeciesRecord)
from impact.webfigure import food_web_svg, trophic_positions


def _eat(consumer, resource):
    return InteractionRecord("predation", consumer, resource, "holling2")


def test_trophic_levels_follow_the_prey_averaged_definition():
    # Levine (1980): a producer has level 1 and a consumer 1 + the mean level of what it eats, so a chain
    # plant → herbivore → carnivore gives 1, 2, 3 and an omnivore eating the plant and the herbivore 2.5.
    names = ["plant", "herbivore", "carnivore", "omnivore"]
    links = [_eat("herbivore", "plant"), _eat("carnivore", "herbivore"), _eat("omnivore", "plant"),
             _eat("omnivore", "herbivore"), InteractionRecord("mutualism", "herbivore", "plant")]
    levels, pos = trophic_positions(names, links)
    assert levels == pytest.approx({"plant": 1.0, "herbivore": 2.0, "carnivore": 3.0, "omnivore": 2.5})
    assert pos["plant"][1] < pos["herbivore"][1] < pos["omnivore"][1] < pos["carnivore"][1]


def test_diagram_names_every_species_and_what_the_options_touch():
    m = Manifest(case=CaseRecord("case.toml", "0" * 64, "diagram"), counts=Counts(1, 1, 1), time_unit="year",
                 horizons=(10.0,), species=(SpeciesRecord("plant", "protected"), SpeciesRecord("pest", "target")),
                 options=(OptionRecord("spray", ("spraying",), ("pest",)),), objectives=(),
                 judgement=Judgement(0.2, 0.05, 100), interactions=(_eat("pest", "plant"),))
    svg = food_web_svg(m).decode()
    for needle in ("plant", "pest", "target", "protected", "Holling II", "acted on by: pest (spray)"):
        assert needle in svg
