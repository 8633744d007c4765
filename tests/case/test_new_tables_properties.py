"""Property-based test of the newer case tables (hypothesis): seasons, breeding seasons, life stages,
crowding, obligate partners, interference, alternative food, sterile releases, season-scheduled
interventions, objectives and limits on change.

Valid cases that use every one of them are mutated (a value replaced by any TOML value or by a value
that makes sense for that field, a key removed, a key of the newer tables added where it does not
belong, an entry duplicated, a reference renamed). Reading the result ends in one of two ways, the
contract README states for bad input: a :class:`Case` that the describing, model-building and
estimating code of ``impact check`` accepts without any other exception, or a :class:`CaseError`
naming the file and a field path that exists in the file. The contract is the project's own; no
published source.

Example count: 250 mutated cases, read in-process; the command line's exit status 2 is checked on a
handful of fixed files.
"""

from __future__ import annotations

import copy
import math
import sys
import tomllib
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).resolve().parent))
from casefiles import field_resolves, mesopredator_case, web_case, write_case  # noqa: E402
from test_case_properties import VALUES, _get, _paths  # noqa: E402

from impact.case import (DEPENDENCES, GROWTH_FORMS, INTERACTION_KINDS, INTERVENTION_KINDS, KIND_ALIASES,  # noqa: E402
    MEASURES, REQUIREMENTS, RESPONSES, Case, parse_case)
from impact.errors import CaseError  # noqa: E402

CASEWORK = Path(__file__).parents[2] / "casework"
EXAMPLES = 250
SETTINGS = settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SEASONS = {"length": 1.0, "parts": 52, "part_name": "week"}


def staged_web() -> dict:
    """The four-species web with a season, a juvenile fox stage, interference, an obligate partner,
    alternative food, crowding, season-scheduled and sterile interventions, objectives and limits."""
    d = web_case()
    d["seasons"] = dict(SEASONS)
    d["species"][0].update(breeding_season={"first": 48, "last": 4, "outside": 0.1}, crowding_mortality=0.001)
    d["species"][2].update(growth="exponential", growth_rate=0.1)
    d["species"].append({"name": "cub", "growth": "none", "mortality": 0.5, "initial": 1.0, "quasi_extinction": 0.01,
                         "matures_into": "fox", "maturation_rate": 1.0, "crowding_mortality": 0.01})
    d["interactions"][1].update(response="beddington-deangelis", interference=0.2)
    d["interactions"][2].update(response="beddington-deangelis", handling_time=0.1, interference=0.2)
    d["interactions"][4].update(dependence="obligate")
    del d["interactions"][4]["max_benefit"]
    d["interactions"].append({"kind": "alternative-food", "consumer": "beetle", "density": 20.0, "response": "holling3",
                              "attack_rate": 0.01, "handling_time": 0.1, "efficiency": 0.1})
    d["interventions"] += [
        {"name": "more grass", "kind": "carrying-capacity-change", "species": "grass", "factor": 1.2,
         "season_parts": [10, 14]},
        {"name": "sit", "kind": "sterile-release", "species": "fox", "sterile_density": 4.0, "competitiveness": 0.5,
         "start": 1.0, "end": 10.0},
        {"name": "spring cull", "kind": "pulse-cull", "species": "fox", "season_part": 14, "start": 2.0, "end": 6.0,
         "fraction": 0.5}]
    d["options"] += [{"name": "sterile", "interventions": ["sit"]},
                     {"name": "grass and cull", "interventions": ["more grass", "spring cull"]}]
    d["objectives"] = [{"name": "hares kept", "species": "hare", "measure": "abundance", "horizon": 20.0,
                        "above": 10.0, "chance_at_least": 0.8},
                       {"name": "no hare plague", "species": "hare", "measure": "outbreak", "horizon": 10.0,
                        "increase_at_most": 0.05}]
    d["change_limits"] = [{"species": "fox", "up_at_most": 2.0, "down_at_most": 3.0, "step": 1.0, "start": -10.0}]
    return d


def seasonal_mesopredator() -> dict:
    """The mesopredator web with a sinusoidal breeding season, objectives and a limit on change."""
    d = mesopredator_case()
    d["seasons"] = {"length": 1.0, "parts": 4, "part_name": "quarter"}
    d["species"][0]["breeding_season"] = {"amplitude": 0.5, "peak": 2.5}
    d["objectives"].append({"name": "meso gone", "species": "meso", "measure": "quasi_extinction", "horizon": 20.0,
                            "decrease_at_least": 0.0})
    d["change_limits"] = [{"species": "bird", "down_at_most": 2.0, "step": 5.0}]
    d["interventions"].append({"name": "fewer meso births", "kind": "fertility-control", "species": "bird",
                               "fraction": 0.1, "season_parts": [4, 1]})
    return d


BASES = (tomllib.loads((CASEWORK / "moth_pollinator.toml").read_text(encoding="utf-8")), staged_web(),
         seasonal_mesopredator())
SPECIES = ("crop", "hawkmoth", "hawkmoth larva", "primrose", "nightjar", "grass", "hare", "fox", "beetle", "cub",
           "bird", "meso", "apex", "carrion", "owl", "")
NUMBERS = st.sampled_from((0, 0.0, -1.0, 1, 2, 0.5, 1e-300, 1e300, 4, 52, 53, 15.5, 20.0, -10.0, -40.0, 1e-9))
PARTS = st.lists(st.integers(-1, 60), min_size=0, max_size=3)
# values that make sense for a field of the newer tables, by key: mutations that get past the type checks
DOMAIN = {
    "growth": st.sampled_from(GROWTH_FORMS), "response": st.sampled_from(RESPONSES),
    "dependence": st.sampled_from(DEPENDENCES), "measure": st.sampled_from(MEASURES),
    "kind": st.sampled_from(INTERVENTION_KINDS + tuple(KIND_ALIASES) + INTERACTION_KINDS),
    "matures_into": st.sampled_from(SPECIES), "species": st.sampled_from(SPECIES),
    "partner": st.sampled_from(SPECIES), "beneficiary": st.sampled_from(SPECIES),
    "consumer": st.sampled_from(SPECIES), "predator": st.sampled_from(SPECIES), "prey": st.sampled_from(SPECIES),
    "season_parts": PARTS, "season_part": st.integers(-1, 60), "first": st.integers(-1, 60),
    "last": st.integers(-1, 60), "parts": st.integers(-1, 100_000), "peak": NUMBERS | st.integers(-1, 60),
    "present": st.booleans(),
    "breeding_season": st.fixed_dictionaries({"first": st.integers(0, 60), "last": st.integers(0, 60)})
    | st.fixed_dictionaries({"amplitude": NUMBERS, "peak": NUMBERS}),
}
# keys of the newer tables, added where they may or may not belong
NEW_KEYS = ("breeding_season", "matures_into", "maturation_rate", "crowding_mortality", "dependence",
            "interference", "density", "sterile_density", "competitiveness", "season_parts", "season_part",
            "max_benefit", "above", "below", *REQUIREMENTS, "up_at_most", "down_at_most", "step", "start", "end")
NEW_TOP = ("seasons", "objectives", "change_limits")


def _is_new(data: dict, where: tuple, key) -> bool:
    """Whether the path names part of a newer table (or a field that decides whether one applies)."""
    path = where + (key,)
    if path[0] in NEW_TOP or any(k in NEW_KEYS or k in ("growth", "kind", "response", "present") for k in path):
        return True
    if len(path) >= 2 and path[0] in ("species", "interactions", "interventions"):
        entry = data[path[0]][path[1]]
        return isinstance(entry, dict) and any(k in entry for k in NEW_KEYS + ("dependence",))
    return False


def _value_for(draw, key):
    pool = DOMAIN.get(key) if isinstance(key, str) else None
    return draw(pool | NUMBERS | VALUES if pool is not None else NUMBERS | VALUES)


@st.composite
def mutated(draw):
    data = copy.deepcopy(draw(st.sampled_from(BASES)))
    for _ in range(draw(st.integers(1, 3))):
        paths = [p for p in _paths(data) if _is_new(data, *p)] or list(_paths(data))
        where, key = draw(st.sampled_from(paths))
        parent = _get(data, where)
        kind = draw(st.sampled_from(("replace", "replace", "delete", "add", "duplicate", "rename")))
        if kind == "replace":
            parent[key] = _value_for(draw, key)
        elif kind == "delete":
            del parent[key]
        elif kind == "add" and isinstance(parent[key], dict):
            new = draw(st.sampled_from(NEW_KEYS))
            parent[key][new] = _value_for(draw, new)
        elif kind == "duplicate" and isinstance(parent[key], list) and parent[key]:
            parent[key].append(copy.deepcopy(parent[key][draw(st.integers(0, len(parent[key]) - 1))]))
        elif kind == "rename" and isinstance(parent[key], str):
            parent[key] = draw(st.sampled_from(SPECIES))
    return data


def _check_like_the_command_line(case: Case):
    """What ``impact check`` does with a case after reading it, and the model and schedules it implies."""
    from impact.cli import describe_case
    from impact.engine.simulate import segment_times
    from impact.ensemble.observe import record_times
    from impact.model import build_web, equations
    from impact.pipeline import case_warnings
    from impact.risk.budget import estimate

    describe_case(case)
    case_warnings(case)
    build_web(case)
    equations(case)
    estimate(case, case.members, 1, memory=None, disk_free=None)
    assert len(record_times(case)) < 1_000_000
    for option in case.options:
        assert len(segment_times(case, option, with_noise=False)) < 1_000_000


def _read(data: dict):
    try:
        case = parse_case(data, "case.toml", "")
    except CaseError as err:
        assert err.file == "case.toml"
        assert err.field and field_resolves(data, err.field), f"field path {err.field!r} names nothing in the case"
        assert err.message
        return err
    _check_like_the_command_line(case)
    return case


def test_the_unmutated_cases_are_valid():
    for base in BASES:
        assert isinstance(_read(copy.deepcopy(base)), Case)


@SETTINGS
@given(mutated())
def test_a_mutated_newer_table_is_a_case_or_a_case_error_naming_a_real_field(data):
    result = _read(data)
    if isinstance(result, Case):
        for iv in result.interventions:
            assert iv.start <= iv.end
            if iv.season_parts is not None:
                assert iv.windows, f"{iv.name}: scheduled by season but never acts"
        for lim in result.change_limits:
            assert lim.check_times() and all(math.isfinite(t) for t in lim.check_times())


def _moth(edit):
    d = copy.deepcopy(BASES[0])
    edit(d)
    return d


CLI_CASES = [  # a mutation, and the field the one-line refusal names
    (lambda d: d["interventions"][1].update(species="hawkmoth larva"), "interventions.sterile moths.species"),
    (lambda d: d["seasons"].update(length=1e-6), "seasons.length"),
    (lambda d: d["species"][2]["breeding_season"].update(outside=1.0), "species.hawkmoth.breeding_season.outside"),
    (lambda d: d["interactions"][2].update(response="holling2"), "interactions[2].interference"),
]


def test_the_command_line_refuses_a_handful_with_exit_2_and_one_line(tmp_path, capsys):
    from impact.cli import main

    assert main(["check", str(write_case(tmp_path, _moth(lambda d: None)))]) == 0
    capsys.readouterr()
    for k, (edit, field) in enumerate(CLI_CASES):
        path = write_case(tmp_path, _moth(edit), f"case{k}.toml")
        assert main(["check", str(path)]) == 2
        err = capsys.readouterr().err
        assert err.startswith(f"error: {path}: {field}: ") and err.count("\n") == 1, err
        assert "Traceback" not in err
