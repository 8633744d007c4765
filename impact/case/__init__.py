"""Read and validate a case file (TOML) into frozen dataclasses.

All checks on user input happen here, once; later stages trust what they receive. The
dataclasses and constants live in :mod:`impact.case.types` (re-exported here), the readers of the
core tables in :mod:`impact.case.reader` and those of the optional tables in
:mod:`impact.case.tables`; this module reads the file and puts the case together.
"""

from __future__ import annotations

import hashlib
import tomllib
from pathlib import Path

from impact.case.reader import (Reader, Table, check_references, read_carrion, read_intervention, read_meta,
    read_observed, read_options, read_parameters, read_risk, read_seasons, read_species, unique)
from impact.case.effects import check_effects
from impact.case.individuals import read_individuals
from impact.case.structures import read_web
from impact.case.studies import read_outcome_values, read_study, read_weighing
from impact.case.surveillance import Surveillance, read_surveillance
from impact.case.tables import (read_calibration, read_change_limit, read_dynamics, read_group, read_monitoring,
    read_objective)
from impact.case.types import (ARRIVAL_KINDS, CARRION, CalibrationTable, Carrion, Case, ChangeLimit, Competition,
    DEFAULT_MATERIAL_CHANGE, DEFAULT_MATERIAL_RISK, DEFAULT_MIN_ACCEPTANCE, DEFAULT_MIN_MEMBERS, DEPENDENCES,
    DynamicsTable, Feeding, GROWTH_FORMS, INTERACTION_KINDS, INTERVENTION_KINDS, Intervention, KIND_ALIASES,
    MEASURES, MonitoringSeries, Mutualism, OTHER_FOOD, Objective, Observation, Option, Parameter, ParameterGroup,
    Quantity, REQUIREMENTS, RESPONSES, ROLES, Risk, SAMPLERS, SERIES_COLUMNS, SERIES_KINDS, SPAN_KINDS, Seasons,
    Species, schedule_text)
from impact.errors import CaseError, ReadError

__all__ = ["ARRIVAL_KINDS", "CARRION", "CalibrationTable", "Carrion", "Case", "ChangeLimit", "Competition",
           "DEFAULT_MATERIAL_CHANGE", "DEFAULT_MATERIAL_RISK", "DEFAULT_MIN_ACCEPTANCE",
           "DEFAULT_MIN_MEMBERS", "DEPENDENCES", "DynamicsTable", "Feeding", "GROWTH_FORMS",
           "INTERACTION_KINDS", "INTERVENTION_KINDS", "Intervention", "KIND_ALIASES", "MEASURES",
           "MonitoringSeries", "Mutualism", "OTHER_FOOD", "Objective", "Observation", "Option", "Parameter",
           "ParameterGroup", "Quantity", "REQUIREMENTS", "RESPONSES", "ROLES", "Risk", "SAMPLERS",
           "SERIES_COLUMNS", "SERIES_KINDS", "SPAN_KINDS", "Seasons", "Species", "Surveillance", "schedule_text", "load_case",
           "parse_case", "unused_parameters"]


def load_case(path: str | Path) -> Case:
    """Read, validate and freeze a case file.

    Raises
    ------
    CaseError
        Naming the file, the field path and what is allowed, for any problem.
    """
    path = Path(path)
    try:
        raw_bytes = path.read_bytes()
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot read the case file ({exc.strerror or exc})") from None
    try:
        data = tomllib.loads(raw_bytes.decode("utf-8"))
    except UnicodeDecodeError:
        raise CaseError(str(path), "", "is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise CaseError(str(path), "", f"malformed TOML: {exc}") from None
    except RecursionError:
        raise CaseError(str(path), "", "values are nested too deeply (arrays or tables inside each other "
                                       "hundreds of levels deep); no case field needs more than two levels") from None
    return parse_case(data, path, hashlib.sha256(raw_bytes).hexdigest())


def unused_parameters(case: Case) -> tuple[str, ...]:
    """Declared parameters that no numeric field of the case refers to, in declaration order.

    They are sampled like the others (so the random streams of every member stay as declared)
    and show no influence in the sensitivity tables; the command line warns about them.
    """
    used = set()
    for item in (*case.species, *case.feeding, *case.competition, *case.mutualism, *case.interventions,
                 *((case.carrion,) if case.carrion is not None else ()), *case.monitoring, *case.surveillance):
        for f in item.__dataclass_fields__.values():
            v = getattr(item, f.name)
            if "Quantity" in str(f.type) and isinstance(v, str):
                used.add(v)
    if case.structures is not None:
        used |= case.structures.parameters_used()
    return tuple(p.name for p in case.parameters if p.name not in used)


def parse_case(data: dict, path: Path, sha256: str = "") -> Case:
    """Validate a parsed TOML document into a :class:`Case` (a :class:`CaseError` names any problem)."""
    r = Reader(path)
    top = Table(r, data, "")
    meta = read_meta(r, top)
    horizon, spinup = meta["horizon"], meta["spinup"]
    parameters = read_parameters(r, top.get("parameters", {}, "any"))
    seasons = read_seasons(r, top.get("seasons", None, "any"), horizon + spinup)
    species = read_species(r, top.get("species", kind="list"), seasons)
    names = {s.name for s in species}
    feeding, competition, mutualism, structures = read_web(r, top.get("interactions", [], "list"),
                                                           top.get("webs", [], "list"), species,
                                                           {p.name for p in parameters})
    carrion = read_carrion(r, top, feeding)
    observed = read_observed(r, top.get("observed", [], "list"), names)
    interventions = tuple(read_intervention(r, i, raw, species, horizon, meta["time_unit"], seasons)
                          for i, raw in enumerate(top.get("interventions", [], "list")))
    unique(r, interventions, "name", "interventions")
    check_effects(r, species, feeding, carrion, interventions)
    options = read_options(r, top.get("options", [], "list"), {iv.name for iv in interventions})
    risk = read_risk(r, top.get("risk", {}), horizon)
    dynamics = read_dynamics(r, top.get("dynamics", None, "any"), [s.name for s in species])
    objectives = tuple(read_objective(r, i, raw, species, horizon, risk.times)
                       for i, raw in enumerate(top.get("objectives", [], "list")))
    unique(r, objectives, "name", "objectives")
    uncertain = {p.name for p in parameters if p.uncertain}
    groups = tuple(read_group(r, i, raw, uncertain) for i, raw in enumerate(top.get("parameter_groups", [], "list")))
    unique(r, groups, "name", "parameter_groups")
    monitoring = tuple(read_monitoring(r, i, raw, names, spinup) for i, raw in enumerate(top.get("monitoring", [], "list")))
    unique(r, monitoring, "species", "monitoring")
    limits = tuple(read_change_limit(r, i, raw, names, spinup) for i, raw in enumerate(top.get("change_limits", [], "list")))
    calibration = read_calibration(r, top.get("calibration", None, "any"))
    studies = tuple(read_study(r, i, raw, species, uncertain, groups) for i, raw in enumerate(top.get("studies", [], "list")))
    unique(r, studies, "name", "studies")
    outcome_values = read_outcome_values(r, top.get("outcome_values", None, "any"), {o.name for o in objectives}, studies)
    weighing = read_weighing(r, top.get("weighing", None, "any"), {o.name for o in options}, {o.name for o in objectives})
    individuals = read_individuals(r, top.get("individuals", None, "any"), species)
    surveillance = tuple(read_surveillance(r, i, raw, species, risk.confidence)
                         for i, raw in enumerate(top.get("surveillance", [], "list")))
    unique(r, surveillance, "species", "surveillance")
    top.done()
    check_references(r, parameters)
    return Case(
        path=str(path), sha256=sha256, **meta, parameters=parameters, species=species, feeding=tuple(feeding),
        competition=tuple(competition), mutualism=tuple(mutualism), carrion=carrion, observed=observed,
        interventions=interventions, options=options, risk=risk, objectives=objectives, groups=groups,
        dynamics=dynamics, seasons=seasons, monitoring=monitoring, change_limits=limits, calibration=calibration,
        structures=structures,
        studies=studies, outcome_values=outcome_values, weighing=weighing, individuals=individuals,
        surveillance=surveillance,
    )
