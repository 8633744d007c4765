"""Food-web figure: trophic levels, and a layout (Graphviz's dot) whose labels neither overlap nor leave it."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from types import SimpleNamespace

import pytest

from impact.api import manifest_for
from impact.case import load_case
from impact.store.manifest import (CaseRecord, Counts, InteractionRecord, Judgement, Manifest, OptionRecord,
    SpeciesRecord)
from impact.dossier.webfigure import food_web_svg, layout_boxes, trophic_levels, web_layout, web_legend

CASEWORK = sorted((Path(__file__).resolve().parents[2] / "casework").glob("*.toml"))


def _eat(consumer, resource):
    return InteractionRecord("predation", consumer, resource, "holling2")


def test_trophic_levels_follow_the_prey_averaged_definition():
    # Levine (1980): a producer has level 1 and a consumer 1 + the mean level of what it eats, so a chain
    # plant → herbivore → carnivore gives 1, 2, 3 and an omnivore eating the plant and the herbivore 2.5.
    names = ["plant", "herbivore", "carnivore", "omnivore"]
    links = [_eat("herbivore", "plant"), _eat("carnivore", "herbivore"), _eat("omnivore", "plant"),
             _eat("omnivore", "herbivore"), InteractionRecord("mutualism", "herbivore", "plant")]
    assert trophic_levels(names, links) == pytest.approx(
        {"plant": 1.0, "herbivore": 2.0, "carnivore": 3.0, "omnivore": 2.5})


def _chain_manifest():
    return Manifest(case=CaseRecord("case.toml", "0" * 64, "diagram"), counts=Counts(1, 1, 1), time_unit="year",
                    horizons=(10.0,), species=(SpeciesRecord("plant", "protected"), SpeciesRecord("pest", "target"),
                                               SpeciesRecord("hawk", "other")),
                    options=(OptionRecord("spray", ("spraying",), ("pest",)),), objectives=(),
                    judgement=Judgement(0.2, 0.05, 100), interactions=(_eat("pest", "plant"), _eat("hawk", "pest")))


def test_diagram_names_every_species_and_the_key_names_what_the_options_touch():
    m = _chain_manifest()
    svg = food_web_svg(m).decode()
    for needle in ("plant", "pest", "target", "protected", "Holling II"):
        assert needle in svg
    assert "pest by “spray”" in web_legend(m) and "predation (red, solid)" in web_legend(m)


def test_producers_are_drawn_below_their_consumers():
    _, nodes, _ = layout_boxes(web_layout(_chain_manifest()))
    y = {b.what: (b.y0 + b.y1) / 2 for b in nodes}  # dot's y grows upwards
    assert y["plant"] < y["pest"] < y["hawk"]


def _casework_manifest(path):
    case = load_case(path)
    return manifest_for(case, SimpleNamespace(counts=dict(wanted=1, tried=1, kept=1)), {}, 0, [], datetime.now(), 0.0)


@pytest.mark.parametrize("path", CASEWORK, ids=lambda p: p.stem)
def test_no_label_overlaps_a_box_or_another_label_or_leaves_the_figure(path):
    """Geometry from dot's own layout (-Tjson): species boxes and link-label boxes (the text's width as dot
    measured it, a quarter of the font size below the baseline to the size above) in points."""
    m = _casework_manifest(path)
    bb, nodes, labels = layout_boxes(web_layout(m))
    assert len(nodes) >= len(m.species) and len(labels) >= 1
    boxes = nodes + labels
    for i, a in enumerate(boxes):
        assert a.inside(bb), (a, bb)
        for b in boxes[i + 1:]:
            assert not a.overlaps(b), (a, b)


def test_without_graphviz_the_web_is_listed_not_drawn(monkeypatch):
    # the report must still be written where dot is not installed; the figure says what it is
    import impact.dossier.webfigure as wf

    monkeypatch.setattr(wf.shutil, "which", lambda name: None)
    assert not wf.dot_available()
    m = _chain_manifest()
    svg = wf.food_web_svg(m).decode()
    assert "not found on this machine" in svg and "apt-get install graphviz" in svg
    for s in m.species:
        assert s.name in svg
    assert sum("→" in line for line in svg.split("<text")) == len(m.interactions)
