"""Case-file validation: every bad input names the file and the field, and says what is allowed."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from casefiles import decline_case, web_case, write_case
from impact.case import load_case
from impact.errors import CaseError
from impact.case.priors import LogNormal

CASEWORK = __import__("pathlib").Path(__file__).parents[2] / "casework"


@pytest.mark.parametrize("name", ["island_mesopredator.toml", "predator_prey.toml", "moth_pollinator.toml"])
def test_example_cases_load_and_are_marked_invented(name):
    case = load_case(CASEWORK / name)
    assert case.invented
    assert "INVENTED" in case.title
    assert len(case.options) >= 1


def test_demo_case_meets_the_brief():
    case = load_case(CASEWORK / "island_mesopredator.toml")
    assert len(case.species) >= 4 and len(case.options) >= 2


def test_web_case_freezes_everything(tmp_path):
    case = load_case(write_case(tmp_path, web_case()))
    assert case.species_names == ("grass", "hare", "fox", "beetle")
    assert [f.kind for f in case.feeding].count("scavenging") == 1
    assert case.intervention("fox cull").times == (2.0, 4.0)
    assert len(case.sha256) == 64
    with pytest.raises(AttributeError):
        case.title = "changed"  # frozen


def _mutate(data, path, value):
    """Set (or delete, with value=...) a nested entry given as a tuple path."""
    d = data
    for k in path[:-1]:
        d = d[k]
    if value is ...:
        del d[path[-1]]
    else:
        d[path[-1]] = value
    return data


BAD = [
    # (description, path in the dict, new value, expected field path, words expected in the message)
    ("unknown species in an interaction", ("interactions", 1, "prey"), "rabbit", "interactions[1].prey", "unknown species 'rabbit'"),
    ("missing required field", ("species", 0, "quasi_extinction"), ..., "species.grass.quasi_extinction", "required"),
    ("negative rate", ("species", 1, "mortality"), -0.1, "species.hare.mortality", ">= 0"),
    ("prior bounds reversed", ("parameters", "grass_r", "low"), 2.0, "parameters.grass_r.high", "reversed"),
    ("intervention outside the horizon", ("interventions", 1, "time"), 25.0, "interventions.fox removal.time", "outside"),
    ("unknown key (typo)", ("species", 2, "mortalty"), 0.3, "species.fox.mortalty", "unknown key"),
    ("wrong type", ("case", "horizon"), "long", "case.horizon", "must be a number"),
    ("bad distribution", ("parameters", "fox_a", "distribution"), "gaussian", "parameters.fox_a.distribution", "choose one of"),
    ("parameter that is not declared", ("species", 0, "growth_rate"), "grass_rate", "species.grass.growth_rate", "not declared"),
    ("prior allows negative rate", ("parameters", "grass_r", "low"), -1.0, "species.grass.growth_rate", "must be >"),
    ("fraction above one", ("parameters", "cull", "high"), 1.5, "interventions.fox cull.fraction", "<= 1"),
    ("option names unknown intervention", ("options", 0, "interventions"), ["fox kill"], "options.cull.interventions", "unknown intervention"),
]


@pytest.mark.parametrize("desc,path,value,field,words", BAD, ids=[b[0] for b in BAD])
def test_bad_input_names_file_field_and_what_is_allowed(tmp_path, desc, path, value, field, words):
    f = write_case(tmp_path, _mutate(web_case(), path, value))
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert err.value.file == str(f)
    assert err.value.field == field
    assert words in err.value.message


def test_malformed_toml(tmp_path):
    f = tmp_path / "broken.toml"
    f.write_text("[case\ntitle = 'x'\n")
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert "malformed TOML" in err.value.message and err.value.file == str(f)


@pytest.mark.parametrize("command", ["check", "assess"])
def test_cli_bad_input_exits_2_without_traceback_or_outputs(tmp_path, command):
    f = write_case(tmp_path, _mutate(web_case(), ("species", 1, "mortality"), -0.1))
    out = tmp_path / "results"
    args = [sys.executable, "-m", "impact.cli", command, str(f)] + (["--out", str(out)] if command == "assess" else [])
    proc = subprocess.run(args, capture_output=True, text=True)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert str(f) in proc.stderr and "species.hare.mortality" in proc.stderr
    assert list(tmp_path.iterdir()) == [f]  # nothing written, not even a partial directory


def test_check_prints_what_it_understood(tmp_path, capsys):
    from impact.cli import main

    assert main(["check", str(write_case(tmp_path, decline_case()))]) == 0
    text = capsys.readouterr().out
    assert "newt" in text and "uniform(-0.2, -0.05)" in text and "press-harvest" in text


OBJ = "objectives.bird spared"
BAD_JUDGEMENT = [
    ("objective on an unknown species", ("objectives", 0, "species"), "owl", f"{OBJ}.species", "unknown species 'owl'"),
    ("objective with an unknown measure", ("objectives", 0, "measure"), "biomass", f"{OBJ}.measure", "choose one of"),
    ("objective with two requirements", ("objectives", 0, "chance_at_most"), 0.5, f"{OBJ}.chance_at_most",
     "exactly one requirement"),
    ("objective without a requirement", ("objectives", 0, "chance_at_least"), ..., f"{OBJ}.chance_at_least",
     "exactly one requirement"),
    ("objective at a horizon that is not a risk horizon", ("objectives", 0, "horizon"), 15.0, f"{OBJ}.horizon",
     "not a risk horizon"),
    ("abundance objective without a level", ("objectives", 0, "above"), ..., f"{OBJ}.below", "exactly one of below"),
    ("requirement above one", ("objectives", 0, "chance_at_least"), 1.5, f"{OBJ}.chance_at_least", "<= 1"),
    ("outbreak objective on a species without an outbreak level", ("objectives", 0, "measure"), "outbreak",
     f"{OBJ}.measure", "no outbreak level"),
    ("unknown role", ("species", 0, "role"), "pest", "species.bird.role", "choose one of: target, protected, other"),
    ("member minimum below one", ("risk", "min_members"), 0, "risk.min_members", ">= 1"),
    ("material change of zero", ("risk", "material_change"), 0.0, "risk.material_change", "> 0"),
]


@pytest.mark.parametrize("desc,path,value,field,words", BAD_JUDGEMENT, ids=[b[0] for b in BAD_JUDGEMENT])
def test_bad_objectives_and_roles_name_the_field(tmp_path, desc, path, value, field, words):
    from casefiles import mesopredator_case

    f = write_case(tmp_path, _mutate(mesopredator_case(), path, value))
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert err.value.field == field
    assert words in err.value.message


def test_objectives_and_roles_are_frozen_with_their_defaults(tmp_path):
    from casefiles import mesopredator_case

    case = load_case(write_case(tmp_path, mesopredator_case()))
    (obj,) = case.objectives
    assert (obj.species, obj.measure, obj.time, obj.requirement, obj.bound, obj.level, obj.below) == \
        ("bird", "abundance", 40.0, "chance_at_least", 0.8, 60.0, False)
    assert obj.event_is_good
    assert [s.role for s in case.species] == ["protected", "other", "target"]
    assert case.material_change("bird") == 0.2 and case.risk.material_risk == 0.05
    assert case.touched(case.options[1]) == frozenset({"apex", "meso"})


def test_parameter_groups_name_uncertain_parameters_only(tmp_path):
    from casefiles import mesopredator_case

    d = mesopredator_case()
    d["parameters"]["bird_r"] = {"distribution": "uniform", "low": 0.9, "high": 1.1, "unit": "1/year"}
    d["species"][0]["growth_rate"] = "bird_r"
    d["parameter_groups"] = [{"name": "both", "parameters": ["meso_attack", "bird_r"]}]
    case = load_case(write_case(tmp_path, d))
    assert case.groups[0].parameters == ("meso_attack", "bird_r")
    d["parameter_groups"] = [{"name": "both", "parameters": ["meso_attack", "nope"]}]
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "parameter_groups.both.parameters" and "not an uncertain parameter" in err.value.message


# --- the terms of pollinator-dependent, seasonal webs --------------------------------------------

SEASONS = {"length": 1.0, "parts": 52, "part_name": "week"}


def _with(edit):
    data = web_case()
    edit(data)
    return data


BAD_TERMS = [
    ("kind and its alias type together", lambda d: d["interactions"][0].update(kind="predation"),
     "interactions[0].type", "`type` is its older alias"),
    ("obligate mutualism with a max_benefit", lambda d: d["interactions"][4].update(dependence="obligate"),
     "interactions[4].max_benefit", "no max_benefit"),
    ("the same mutualist pair twice",
     lambda d: d["interactions"].append(dict(d["interactions"][4], dependence="obligate", max_benefit=None)),
     "interactions[5].partner", "already declared a mutualist partner"),
    ("mutualism on a species without births of its own",
     lambda d: d["interactions"][4].update(beneficiary="hare"),
     "interactions[4].beneficiary", "growth = \"none\""),
    ("unknown dependence", lambda d: d["interactions"][4].update(dependence="partial"),
     "interactions[4].dependence", "facultative, obligate"),
    ("interference on a Holling II link", lambda d: d["interactions"][1].update(interference=0.1),
     "interactions[1].interference", "beddington-deangelis"),
    ("holling2 and beddington-deangelis for one consumer",
     lambda d: (d["interactions"][1].update(response="beddington-deangelis", interference=0.1),
                d["interactions"].append({"type": "predation", "predator": "fox", "prey": "beetle", "response": "holling2",
                                          "attack_rate": 0.01, "handling_time": 0.1, "efficiency": 0.1})),
     "interactions", "mixes holling2 and beddington-deangelis"),
    ("negative crowding mortality", lambda d: d["species"][2].update(crowding_mortality=-0.1),
     "species.fox.crowding_mortality", ">= 0"),
    ("breeding season without [seasons]", lambda d: d["species"][0].update(breeding_season={"first": 1, "last": 3}),
     "species.grass.breeding_season", "needs a [seasons] table"),
    ("breeding season past the last part",
     lambda d: (d.update(seasons=SEASONS), d["species"][0].update(breeding_season={"first": 50, "last": 53})),
     "species.grass.breeding_season", "from 1 to 52"),
    ("season parts of an intervention out of range",
     lambda d: (d.update(seasons=SEASONS), d["interventions"][2].update(season_parts=[0, 4])),
     "interventions.no-op.season_parts", "two whole numbers from 1 to 52"),
    ("first arrival of a species present today",
     lambda d: d["interventions"][2].update(kind="first-arrival", time=1.0, amount=3.0, rate=None),
     "interventions.no-op.species", "use kind = \"release\""),
    ("sterile release without a density",
     lambda d: d["interventions"].append({"name": "sit", "kind": "sterile-release", "species": "hare"}),
     "interventions.sit.sterile_density", "required"),
    ("two alternative foods for one consumer",
     lambda d: d["interactions"].extend([{"kind": "alternative-food", "consumer": "fox", "density": 10.0, "attack_rate": 0.1,
                                          "handling_time": 0.1, "efficiency": 0.1}] * 2),
     "interactions[6].consumer", "already has an alternative food"),
    ("sinusoidal breeding with an amplitude above one",
     lambda d: (d.update(seasons=SEASONS), d["species"][0].update(breeding_season={"amplitude": 1.5, "peak": 20})),
     "species.grass.breeding_season.amplitude", "<= 1"),
    ("breeding season mixing a window and a sinusoid",
     lambda d: (d.update(seasons=SEASONS), d["species"][0].update(breeding_season={"amplitude": 0.5, "peak": 20, "first": 3})),
     "species.grass.breeding_season.first", "unknown key"),
    ("juvenile stage that breeds", lambda d: d["species"][0].update(matures_into="hare", maturation_rate=1.0),
     "species.grass.growth", "does not breed"),
    ("juvenile of an unknown species", lambda d: d["species"][1].update(matures_into="owl", maturation_rate=1.0),
     "species.hare.matures_into", "must name another declared species"),
    ("juvenile without a maturation rate", lambda d: d["species"][1].update(matures_into="fox"),
     "species.hare.maturation_rate", "required"),
    ("a chain of three stages",
     lambda d: (d["species"][1].update(matures_into="fox", maturation_rate=1.0),
                d["species"][3].update(matures_into="hare", maturation_rate=1.0)),
     "species.beetle.matures_into", "itself a juvenile stage"),
    ("pulse cull with both times and a season part",
     lambda d: (d.update(seasons=SEASONS), d["interventions"][0].update(season_part=10)),
     "interventions.fox cull.times", "exactly one of times"),
    # declarations that would silently change nothing, and schedules that would ask for unbounded work
    ("harvest scheduled in weeks that never fall between start and end",
     lambda d: (d.update(seasons=SEASONS), d["interventions"][2].update(start=0.0, end=0.1, season_parts=[30, 40])),
     "interventions.no-op.season_parts", "would never act"),
    ("harvest over no time", lambda d: d["interventions"][2].update(start=5.0, end=5.0),
     "interventions.no-op.end", "must be after start"),
    ("seasons so short the horizon holds millions of parts",
     lambda d: d.update(seasons={"length": 1e-6, "parts": 52}), "seasons.length", "at most 100,000"),
    ("sterile release on a species without births",
     lambda d: (d["interactions"][3].update(efficiency=0.0),
                d["interventions"].append({"name": "sit", "kind": "sterile-release", "species": "beetle",
                                           "sterile_density": 4.0})),
     "interventions.sit.species", "has no births"),
    ("fertility control on a juvenile stage",
     lambda d: (d["species"][1].update(matures_into="fox", maturation_rate=1.0),
                d["interventions"].append({"name": "pill", "kind": "fertility-control", "species": "hare",
                                           "fraction": 0.5})),
     "interventions.pill.species", "give it to the adult stage 'fox'"),
    ("breeding season of a species without births",
     lambda d: (d.update(seasons=SEASONS), d["interactions"][3].update(efficiency=0.0),
                d["species"][3].update(breeding_season={"first": 10, "last": 20})),
     "species.beetle.breeding_season", "has no births"),
    ("breeding season with the same births outside it",
     lambda d: (d.update(seasons=SEASONS), d["species"][0].update(breeding_season={"first": 10, "last": 20, "outside": 1.0})),
     "species.grass.breeding_season.outside", "the same in and out"),
    ("breeding season covering the whole season",
     lambda d: (d.update(seasons=SEASONS), d["species"][0].update(breeding_season={"first": 5, "last": 4})),
     "species.grass.breeding_season.last", "cover the whole season"),
    ("sinusoidal breeding season of amplitude 0",
     lambda d: (d.update(seasons=SEASONS), d["species"][0].update(breeding_season={"amplitude": 0.0, "peak": 20})),
     "species.grass.breeding_season.amplitude", "the same all season"),
    ("carcasses sent to a carrion pool the case lacks",
     lambda d: (d.pop("carrion"), d["interactions"].pop(3)),
     "interventions.fox cull.carcasses_to_carrion", "no [carrion] table"),
    ("a seasonal schedule starting far before today",  # the windows were listed season by season from there
     lambda d: (d.update(seasons=SEASONS), d["interventions"][2].update(start=-1e300, season_parts=[3, 5])),
     "interventions.no-op.start", ">= 0"),
    ("a cull in a season part, ending far after the horizon",
     lambda d: (d.update(seasons=SEASONS), d["interventions"][0].pop("times"), d["interventions"][0].update(season_part=3, end=1e300)),
     "interventions.fox cull.end", "<= 20"),
    ("a species absent today with animals at the start",
     lambda d: d["species"][3].update(present=False, initial=5.0),
     "species.beetle.initial", "starts at 0"),
    ("mutualism on a species in exponential decline",
     lambda d: d["species"][0].update(growth="exponential", growth_rate=-0.1, carrying_capacity=None),
     "interactions[4].beneficiary", "no births to act on"),
]


def _drop_none(data):
    for iv in data["interventions"] + data["interactions"] + data["species"]:
        for k in [k for k, v in iv.items() if v is None]:
            del iv[k]
    return data


@pytest.mark.parametrize("desc,edit,field,words", BAD_TERMS, ids=[b[0] for b in BAD_TERMS])
def test_bad_new_terms_name_the_field(tmp_path, desc, edit, field, words):
    f = write_case(tmp_path, _drop_none(_with(edit)))
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert err.value.field == field
    assert words in err.value.message


def test_new_terms_and_aliases_are_read(tmp_path):
    def edit(d):
        d["seasons"] = SEASONS
        for it in d["interactions"]:
            it["kind"] = it.pop("type")  # the selector key of interventions, now also of interactions
        d["interactions"][1].update(response="beddington-deangelis", interference="fox_a")
        d["interactions"][4].update(dependence="obligate")
        del d["interactions"][4]["max_benefit"]
        d["species"][0].update(breeding_season={"first": 48, "last": 4, "outside": 0.1}, crowding_mortality=0.001)
        d["interventions"] += [
            {"name": "more grass", "kind": "habitat-change", "species": "grass", "factor": 1.2, "season_parts": [10, 14]},
            {"name": "stock hares", "kind": "introduction", "species": "hare", "time": 2.0, "amount": 5.0},
            {"name": "sit", "kind": "sterile-release", "species": "hare", "sterile_density": 40.0, "competitiveness": 0.5},
            {"name": "spring cull", "kind": "pulse-cull", "species": "fox", "season_part": 14, "start": 2.0, "end": 6.0,
             "fraction": 0.5}]
    case = load_case(write_case(tmp_path, _with(edit)))
    assert case.feeding[1].response == "beddington-deangelis" and case.feeding[1].interference == "fox_a"
    assert case.mutualism[0].obligate and case.mutualism[0].max_benefit == 0.0
    assert case.species[0].breeding_season == (48, 4) and case.species[0].breeding_outside == 0.1
    assert case.intervention("more grass").kind == "carrying-capacity-change"  # documented alias
    assert case.intervention("more grass").windows[0] == (9 / 52, 14 / 52)
    assert case.intervention("stock hares").kind == "release"  # documented alias
    assert case.intervention("spring cull").times == tuple(k + 13 / 52 for k in (2, 3, 4, 5))
    # a wrapping breeding season (weeks 48 to 4) is one span across the turn of the season
    assert case.seasons.windows(48, 4, 0.0, 2.0) == ((0.0, 4 / 52), (47 / 52, 1 + 4 / 52), (1 + 47 / 52, 2.0))


def test_units_that_name_another_time_unit_are_warned_about(tmp_path, capsys):
    # README's units table: rates are per time unit of the case, efficiencies have no time in them
    from impact.case.units import unit_warnings
    from impact.cli import main

    data = web_case()
    data["parameters"]["grass_r"]["unit"] = "1/day"  # a growth rate, but the case counts years
    data["parameters"]["cull"]["unit"] = "fraction per year"  # a cull fraction has no time in it
    f = write_case(tmp_path, data)
    warnings = unit_warnings(load_case(f))
    assert len(warnings) == 2
    assert "parameters.grass_r" in warnings[0] and "'year'" in warnings[0] and "species.grass.growth_rate" in warnings[0]
    assert "parameters.cull" in warnings[1] and "no time in its dimension" in warnings[1]
    assert main(["check", str(f)]) == 0
    assert capsys.readouterr().out.count("warning:") == 2
    assert unit_warnings(load_case(write_case(tmp_path, web_case()))) == ()  # ha/year, 1/year: consistent
    data = web_case()
    data["species"][0]["unit"] = "g/m2"
    data["parameters"]["k"] = {"distribution": "uniform", "low": 900.0, "high": 1100.0, "unit": "kg/ha"}
    data["species"][0]["carrying_capacity"] = "k"
    (warning,) = unit_warnings(load_case(write_case(tmp_path, data)))
    assert "parameters.k" in warning and "not grass's unit 'g/m2'" in warning


def _lognormal_capacity(prior: dict) -> dict:
    data = web_case()
    data["parameters"]["K"] = {**prior, "unit": "g/m2"}
    data["species"][0]["carrying_capacity"] = "K"
    return data


def test_a_lognormal_carrying_capacity_is_accepted_and_never_draws_zero(tmp_path):
    # a lognormal's support is (0, ∞) and never reaches 0, so a field that must be > 0 accepts it
    # (Johnson, Kotz & Balakrishnan 1994, Continuous Univariate Distributions 1, ch. 14,
    # from memory)
    from impact.ensemble.sample import member_uniforms, parameter_values

    case = load_case(write_case(tmp_path, _lognormal_capacity({"distribution": "lognormal", "median": 1000.0,
                                                               "log_sd": 0.5})))
    assert "K" in [p.name for p in case.uncertain]
    K = parameter_values(case, member_uniforms(case.seed, np.arange(20_000), len(case.uncertain)))["K"]
    assert (K > 0).all() and np.isfinite(K).all()
    # the ends of the unit interval a stream can give (u = 0 exactly) and a log-sd wide enough to underflow
    prior = case.parameter("K").prior
    assert prior.ppf(np.array([0.0]))[0] > 0
    assert (LogNormal(1.0, 200.0).ppf(np.array([0.0, 1e-12, 0.5])) > 0).all()


@pytest.mark.parametrize("prior,words", [
    # a uniform and a truncated normal on [0, ...] can draw 0 itself: still refused for a field that must be > 0
    ({"distribution": "uniform", "low": 0.0, "high": 2000.0}, "can take values down to 0, but this field must be > 0"),
    ({"distribution": "truncated-normal", "mean": 1000.0, "sd": 300.0, "low": 0.0, "high": 3000.0},
     "can take values down to 0, but this field must be > 0"),
])
def test_a_prior_that_reaches_zero_is_still_refused_where_the_field_must_be_positive(tmp_path, prior, words):
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, _lognormal_capacity(prior)))
    assert err.value.field == "species.grass.carrying_capacity" and words in err.value.message


def test_a_lognormal_observation_scale_is_accepted(tmp_path):
    data = _lognormal_capacity({"distribution": "lognormal", "median": 1000.0, "log_sd": 0.5})
    data["parameters"]["trap_scale"] = {"distribution": "lognormal", "median": 0.8, "log_sd": 0.2, "unit": "1"}
    data["monitoring"] = [{"species": "hare", "kind": "index", "error": "lognormal", "times": [-2, -1, 0],
                           "values": [30.0, 32.0, 31.0], "scale": "trap_scale", "log_sd": 0.3}]
    case = load_case(write_case(tmp_path, data))
    assert "trap_scale" in [p.name for p in case.uncertain]


def test_a_limit_on_change_with_too_many_steps_is_refused(tmp_path):
    # 1e-6 steps over 20 time units would record twenty million states of every member's spin-up
    d = web_case()
    d["change_limits"] = [{"species": "fox", "up_at_most": 2.0, "step": 1e-6, "start": -20.0}]
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "change_limits.fox.step" and "at most 1,000" in err.value.message
    d["change_limits"][0]["step"] = 0.5
    assert len(load_case(write_case(tmp_path, d)).change_limits[0].check_times()) == 41


def test_a_doubtful_interaction_whose_consumer_is_not_a_name_is_a_case_error(tmp_path):
    # a list where the predator's name belongs once reached a dictionary lookup (TypeError)
    d = web_case()
    d["interactions"][1].update(response="beddington-deangelis", interference=0.2, predator=["fox"],
                                doubt={"label": "foxes interfere", "weight": 0.5, "alternatives": [
                                    {"label": "foxes do not interfere", "weight": 0.5, "interference": 0.0}]})
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "interactions[1].predator" and "text" in err.value.message
