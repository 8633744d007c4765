"""The Python interface: run an assessment, get typed results back, save them, read them, report them.

The verbs are also ``impact.assess``, ``impact.calibrate``, ``impact.load``, ``impact.save`` and
``impact.report``. A case is a path to a case file or a case already read by :func:`load_case`;
the keywords override the case's own settings. (Run from a folder holding the casework; the suite
runs this example.)

>>> import impact
>>> result = impact.assess("casework/island_mesopredator.toml", members=200, seed=3,
...                        sensitivity=False, dynamics=False)
>>> result.effects.columns[:2].tolist()      # paired effects: the columns of effects.csv
['option', 'species']
>>> print(result.verdict_text().splitlines()[0])      # the page-1 verdict as text
option “cats only”:
>>> folder = impact.save(result, "results/example", report=False)  # tables, manifest, summary.txt
>>> again = impact.load(folder)                # the saved tables, read back and checked
>>> again.verdict_text() == result.verdict_text()
True

The command-line interface is a thin shell over these functions.
"""

from __future__ import annotations

import os
import platform
import time
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from impact.version import __version__
from impact.ensemble.draws import Ensemble
from impact.risk.eradication import eradication_tables
from impact.risk.runs import assess_members, bands_table, failure_counts, members_table, risk_table
from impact.risk.bystructure import member_structures, structure_tables
from impact.ensemble.posterior import calibration_tables
from impact.ensemble.calibrate import (Calibration, build_ensemble, calibration_from_record,
    ensemble_from_arrays)
from impact.case import Case, schedule_text
from impact.case import load_case as _read_case
from impact.decision.hinges import drivers_table, information_table
from impact.risk.effects import comparisons_table, effects_table, event_text, objectives_table
from impact.errors import ReadError, SettingError
from impact.store.manifest import (CaseRecord, ChangeLimitRecord, Counts, InteractionRecord, InterventionRecord,
    Judgement, Manifest, MonitoringRecord, ObjectiveRecord, OptionRecord, SpeciesRecord)
from impact.model import equations
from impact.ensemble.sample import unit_columns

__all__ = ["AssessSettings", "Assessment", "PosteriorEnsemble", "assess", "build_report", "calibrate", "load",
           "load_case", "load_ensemble", "report", "save", "save_ensemble", "summary_text", "verify"]

CAUTION = ("Model-based screening aid: results depend on the model structure and priors shown. "
           "Decisions rest with licensed ecological review and the applicable local regulations and permits.")
PLAUSIBILITY_RULE = ("kept draws whose deterministic spin-up keeps every species present today above its "
                     "quasi-extinction level over the second half of spin-up and whose state today lies in "
                     "every observed range")
Progress = Callable[[str], None]


def load_case(path) -> Case:
    """Read and validate a case file (raises :class:`impact.errors.CaseError` naming the field)."""
    return _read_case(path)


@dataclass(frozen=True)
class AssessSettings:
    """What to run. ``None`` takes the case's own value.

    Attributes
    ----------
    members : int, optional
        Plausible members wanted (default ``case.members``).
    seed : int, optional
        Seed of the one random path (default ``case.seed``; 0 is a seed like any other).
    sensitivity : bool
        Main effects and value of information on the kept members, and the Sobol screen of the prior box.
    base_samples : int
        Sobol base samples N of the prior screen (a power of two).
    dynamics : bool
        Regime, Lyapunov exponent and predictability screen.
    """

    members: int | None = None
    seed: int | None = None
    sensitivity: bool = True
    base_samples: int = 128
    dynamics: bool = True

    def resolved(self, case: Case, ensemble: "PosteriorEnsemble | None" = None) -> "AssessSettings":
        """These settings with the case's values filled in and checked (:class:`SettingError`).

        A reused ``ensemble`` sets the members; ``members``, if given, must equal its size.
        Resolving resolved settings again changes nothing.
        """
        if ensemble is not None:
            size = len(ensemble.ensemble.draws)
            if self.members is not None and self.members != size:
                raise SettingError("members", f"the reused ensemble has {size} members, not {self.members}; "
                                              "leave `members` out")
            self = replace(self, members=size)
        members = self.members if self.members is not None else case.members
        seed = self.seed if self.seed is not None else case.seed
        if members < 1:
            raise SettingError("members", f"must be at least 1, got {members}")
        if seed < 0:
            raise SettingError("seed", f"must be a non-negative whole number, got {seed}")
        if self.sensitivity:
            from impact.decision.sensitivity import Settings as ScreenSettings
            from impact.decision.sensitivity import check_settings

            check_settings(ScreenSettings(base_samples=self.base_samples, seed=seed))  # before any simulation
        return replace(self, members=members, seed=seed)


@dataclass
class Assessment:
    """An assessment: the manifest and every results table, from a run in memory or read back from a folder.

    ``tables`` maps the relative path of each results file (``"risk.csv"``,
    ``"sensitivity/drivers.csv"``, ...) to its DataFrame; ``records`` does the same for JSON records.
    ``case``, ``ensemble`` and ``calibration`` are there after a run in this process; an assessment
    read by :func:`load` has its ``folder`` instead (and its ``case`` when the case file it names is
    still there, unchanged).
    """

    case: Case | None
    ensemble: Ensemble | None
    manifest: Manifest
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    records: dict[str, dict] = field(default_factory=dict)
    calibration: Calibration | None = None
    folder: Path | None = None

    @property
    def risk(self) -> pd.DataFrame:
        return self.tables["risk.csv"]

    @property
    def effects(self) -> pd.DataFrame:
        return self.tables["effects.csv"]

    @property
    def objectives(self) -> pd.DataFrame:
        return self.tables["objectives.csv"]

    @property
    def comparisons(self) -> pd.DataFrame:
        return self.tables["comparisons.csv"]

    @property
    def thin(self) -> bool:
        """Too few plausible members for a verdict (``risk.min_members``)."""
        return self.manifest.counts.kept < self.manifest.judgement.min_members

    def verdict_text(self) -> str:
        """The page-1 verdict as text (the same words as ``report.pdf`` and ``summary.txt``)."""
        from impact.dossier.verdict import reading, reading_text

        t = self.tables
        return reading_text(reading(self.manifest, t["risk.csv"], t["effects.csv"], t["objectives.csv"],
                                    t["comparisons.csv"]))

    def write(self, folder: Path) -> None:
        """Write every table and record and the manifest into ``folder`` (no report, no summary)."""
        from impact.store.results import write_csv, write_json

        folder = Path(folder)
        for rel, frame in self.tables.items():
            write_csv(frame, folder / rel)
        for rel, rec in self.records.items():
            write_json(rec, folder / rel)
        write_json(self.manifest.to_json(), folder / "manifest.json")


def package_versions() -> dict[str, str]:
    out = {"python": platform.python_version(), "impact": __version__}
    for name in ("numpy", "scipy", "pandas", "SALib", "jinja2", "weasyprint", "matplotlib", "networkx"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def case_record(case: Case) -> CaseRecord:
    """What every manifest records of the case file: where it is, its SHA-256, its title."""
    return CaseRecord(path=str(Path(case.path).resolve()), sha256=case.sha256, title=case.title,
                      analyst=case.analyst, description=case.description, invented=case.invented)


def run_header(case: Case, command, stages: tuple[str, ...], **entries) -> dict:
    """The manifest of a run that is not a whole assessment (calibration, prior screen, scan).

    The same header every manifest starts with (tool, version, command, stages, case, packages),
    then the run's own ``entries``. An assessment's manifest is the typed :class:`Manifest` of
    :func:`manifest_for`, which records the case the same way (:func:`case_record`).
    """
    import sys

    record = case_record(case)
    return {"tool": "impact", "version": __version__, "command": [str(a) for a in (command or sys.argv)],
            "stages": list(stages),
            "case": {"path": record.path, "sha256": record.sha256, "title": record.title, "invented": record.invented},
            "packages": package_versions(), **entries}


def priors_table(case: Case) -> pd.DataFrame:
    from impact.store.results import TABLES

    rows = []
    for p in case.parameters:
        args = {k: getattr(p.prior, k) for k in p.prior.__dataclass_fields__}
        rows.append(dict(name=p.name, distribution=p.prior.kind, arguments=p.prior.describe(),
                         unit=p.unit, source=p.source, description=p.description,
                         uncertain=p.uncertain, **{f"arg_{k}": v for k, v in args.items()}))
    # a case without parameters still writes the table's columns (read back as an empty table)
    return pd.DataFrame(rows) if rows else pd.DataFrame(columns=[*TABLES["priors.csv"][0], "uncertain"])


def parameters_table(case: Case, ens: Ensemble) -> pd.DataFrame:
    """``parameters.csv``: each kept member's parameter values (and its structure, when the case has doubts)."""
    frame = pd.DataFrame({"member": ens.draws, **{p.name: ens.values[p.name] for p in case.uncertain}})
    if case.structures is not None:
        frame["structure"] = np.array(case.structures.names, dtype=object)[member_structures(case, ens.unit)]
    return frame


def manifest_for(case: Case, ens: Ensemble, failures: dict, seed: int, command: list[str], started: datetime,
                 seconds: float, stages: tuple[str, ...] = ("assess",), sensitivity: dict | None = None,
                 execution: dict | None = None, calibration: dict | None = None) -> Manifest:
    """The manifest of an assessment: what was run, on what, and everything the report needs of the case."""
    return Manifest(
        tool="impact", version=__version__,
        case=case_record(case),
        command=tuple(str(a) for a in command), started_utc=started.isoformat(timespec="seconds"),
        seconds=round(seconds, 2), seed=seed, counts=Counts(**ens.counts, failed_by_option=failures),
        time_unit=case.time_unit, horizon=case.horizon, horizons=tuple(case.risk.times),
        confidence=case.risk.confidence, recovery_fraction=case.risk.recovery_fraction,
        species=tuple(SpeciesRecord(name=s.name, unit=s.unit, quasi_extinction=s.quasi_extinction, outbreak=s.outbreak,
                                    generation_time=s.generation_time, present=s.present, growth=s.growth, role=s.role,
                                    material_change=case.material_change(s.name)) for s in case.species),
        options=tuple(OptionRecord(name=o.name, interventions=tuple(o.interventions), description=o.description,
                                   touches=tuple(sorted(case.touched(o)))) for o in case.options),
        objectives=tuple(ObjectiveRecord(name=o.name, species=o.species, measure=o.measure, horizon=o.time,
                                         requirement=o.requirement, bound=o.bound, event=event_text(case, o),
                                         description=o.description,
                                         level=o.level if o.measure == "abundance" else None)
                         for o in case.objectives),
        judgement=Judgement(material_change=case.risk.material_change, material_risk=case.risk.material_risk,
                            min_members=case.risk.min_members,
                            likelihood_scale="IPCC likelihood scale (Mastrandrea et al. 2010)"),
        interventions=tuple(InterventionRecord(name=iv.name, kind=iv.kind, species=iv.species, start=iv.start,
                                               end=iv.end, description=iv.description, schedule=schedule_text(case, iv))
                            for iv in case.interventions),
        # who acts on whom, for the report's food-web diagram (drawn from saved results alone)
        interactions=(tuple(InteractionRecord(f.kind, f.consumer, f.resource, f.response) for f in case.feeding)
                      + tuple(InteractionRecord("competition", c.competitor, c.species) for c in case.competition)
                      + tuple(InteractionRecord("mutualism", u.partner, u.beneficiary, "obligate" if u.obligate else None)
                              for u in case.mutualism)
                      + tuple(InteractionRecord("life-stage", s.name, s.matures_into) for s in case.species
                              if s.matures_into is not None)),
        equations=tuple(equations(case)), assumptions=tuple(case.notes), plausibility=PLAUSIBILITY_RULE,
        packages=package_versions(), platform=platform.platform(), stages=tuple(stages), caution=CAUTION,
        sensitivity=sensitivity, execution=execution, calibration=calibration,
        monitoring=tuple(MonitoringRecord(species=m.species, kind=m.kind, error=m.error, observations=len(m.times),
                                          first=m.times[0], last=m.times[-1], file=m.file, source=m.source)
                         for m in case.monitoring),
        change_limits=tuple(ChangeLimitRecord(species=c.species, up_at_most=c.up, down_at_most=c.down, step=c.step,
                                              start=c.start, end=c.end, source=c.source) for c in case.change_limits),
    )


@dataclass
class StageOutput:
    """What a stage of the assessment hands on: its tables and JSON records (by relative path in the results
    folder), the stages it ran (their names in ``manifest.stages``) and its entry in the manifest.

    Every stage the assessment runs after the option runs returns one; :func:`assess` merges them in order.
    """

    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    records: dict[str, dict] = field(default_factory=dict)
    stages: tuple[str, ...] = ()
    entry: dict | None = None

    def merged(self, other: "StageOutput") -> "StageOutput":
        """This output followed by ``other`` (a later stage's tables win on the same path; the entry is the later one's)."""
        return StageOutput({**self.tables, **other.tables}, {**self.records, **other.records},
                           self.stages + other.stages, other.entry if other.entry is not None else self.entry)


def prior_screen(case: Case, settings, progress: Progress | None = None, executor=None, store=None) -> StageOutput:
    """The Sobol screen of the prior box: its tables, its record, and the manifest entry."""
    from impact.decision.sensitivity import sensitivity_stage

    t0 = time.monotonic()
    res = sensitivity_stage(case, settings, progress=progress, executor=executor, store=store)
    tables = {"sensitivity/indices.csv": res.indices, "sensitivity/second_order.csv": res.second_order,
              "sensitivity/ranking.csv": res.ranking, "sensitivity/convergence.csv": res.convergence}
    info = {**res.info, "seconds_total": round(time.monotonic() - t0, 2)}
    entry = {"N": info["N"], "runs": info["runs"], "not_converged": info["not_converged"],
             "refused": len(info["refused"]), "conditional_on": info["conditional_on"]}
    return StageOutput(tables, {"sensitivity/sensitivity.json": info}, ("sensitivity",), entry)


def press_stage(case: Case, ens: Ensemble, runs: dict, progress: Progress | None = None) -> StageOutput:
    """What the web's structure alone decides, and how often the members agree (press_signs.csv)."""
    from impact.dynamics.press import press_table

    if progress:
        progress("press responses: the web's structure and the members")
    table, record = press_table(case, ens.params, ens.values, runs["baseline"])
    return StageOutput({"press_signs.csv": table}, {"press_signs.json": record}, ("press",))


def hinges_stage(case: Case, ens: Ensemble, runs: dict, seed: int, progress: Progress | None = None) -> StageOutput:
    """What the decision hinges on, on the kept members: drivers, value of information, studies, weighing."""
    if not case.uncertain:
        return StageOutput()
    if progress:
        progress("sensitivity and value of information on the plausible members")
    from impact.decision.voi import shared_gains

    tables = {"sensitivity/drivers.csv": drivers_table(case, ens.values, runs, seed)}
    if case.objectives:
        with shared_gains():  # the studies' ceilings are EVPPIs of information.csv: computed once
            tables["sensitivity/information.csv"] = information_table(case, ens.values, runs, seed)
            if case.studies:
                from impact.decision.studies import study_tables

                tables["sensitivity/studies.csv"], tables["sensitivity/study_sizes.csv"] = study_tables(
                    case, ens.values, ens.today, ens.draws, runs, seed)
        if case.weighing is not None:
            from impact.decision.weighing import weighing_tables

            tables.update(weighing_tables(case, runs, seed, ens.draws))
    return StageOutput(tables, stages=("sensitivity",))


def decision_stage(case: Case, settings: AssessSettings, seed: int, ens: Ensemble, runs: dict, progress=None,
                   executor=None, store=None) -> StageOutput:
    """The press signs, what the decision hinges on and the Sobol screen of the prior box, in that order.

    The manifest entry is the prior screen's (or why it was skipped); the prior screen's own stage name
    is not added (``sensitivity`` already names the stage).
    """
    from impact.decision.sensitivity import Settings as ScreenSettings

    if len(case.uncertain) < 2:
        out = press_stage(case, ens, runs, progress).merged(hinges_stage(case, ens, runs, seed, progress))
        return out.merged(StageOutput(entry={"skipped": f"{len(case.uncertain)} uncertain parameter(s); the Sobol "
                                                        "screen needs at least two"}))
    screen = ScreenSettings(base_samples=settings.base_samples, seed=seed, confidence=case.risk.confidence)
    # with more than one worker the screen's simulations run on the workers while this thread computes the
    # press signs and what the decision hinges on (neither depends on the other; the numbers are the same)
    found = _started(prior_screen, (case, screen, progress, executor, store),
                     parallel=getattr(executor, "workers", 1) > 1)
    out = press_stage(case, ens, runs, progress).merged(hinges_stage(case, ens, runs, seed, progress))
    found = found()
    return out.merged(StageOutput(found.tables, found.records, (), found.entry))


def _started(fn: Callable, args: tuple, parallel: bool) -> Callable:
    """``fn(*args)`` started in a thread of its own if ``parallel`` (else called when asked for); returns the call
    that waits for its result (and raises its error)."""
    if not parallel:
        return lambda: fn(*args)
    import threading

    box: dict = {}

    def run():
        try:
            box["value"] = fn(*args)
        except BaseException as e:  # handed to the caller, who decides what it means
            box["error"] = e

    thread = threading.Thread(target=run, name="impact-prior-screen", daemon=True)
    thread.start()

    def result():
        thread.join()
        if "error" in box:
            raise box["error"]
        return box["value"]

    return result


def dynamics_stage(case: Case, ens: Ensemble, runs: dict, seed: int, progress=None, executor=None) -> StageOutput:
    """The regime screen of every option (and the regime shares of each web, for a case with structural doubts)."""
    from impact.dynamics.regime_screen import assess_stage

    dyn, record = assess_stage(case, ens.params, ens.values, runs, progress=progress, executor=executor, seed=seed)
    tables = {f"dynamics/{k}.csv": v for k, v in dyn.items()}
    if case.structures is not None and len(dyn["regimes"]):  # the regimes of each web's members
        from impact.dynamics.structureregimes import regime_shares_by_structure

        tables["structures/regime_shares.csv"] = regime_shares_by_structure(
            case.structures.names, dyn["regimes"], member_structures(case, ens.unit))
    return StageOutput(tables, {"dynamics/dynamics.json": record}, ("dynamics",))


@dataclass
class PosteriorEnsemble:
    """A calibrated ensemble on its own (``impact calibrate``), for a later assessment to reuse.

    ``tables`` holds ``parameters.csv`` and the ``calibration/`` tables by relative path;
    ``source`` is the folder it was read from (None when built in this process).
    """

    case: Case
    ensemble: Ensemble
    calibration: Calibration
    manifest: dict
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    source: str | None = None


def calibrate(case: Case | str | Path, members: int | None = None, seed: int | None = None, *,
              progress: Progress | None = None, executor=None, command: list[str] | None = None) -> PosteriorEnsemble:
    """Build the ensemble of ``case`` (calibrated where it has data) without running any option.

    ``case`` is a :class:`Case` or the path of a case file.
    """
    case = as_case(case)
    members = members if members is not None else case.members
    seed = seed if seed is not None else case.seed
    started, t0 = datetime.now(timezone.utc), time.monotonic()
    _compile_aside(case, flow=False, lanes=members >= LANES_ASIDE_MEMBERS)
    with _helpers_ended():
        ens, cal = build_ensemble(case, members, seed, progress=progress, executor=executor)
    tables = {"parameters.csv": parameters_table(case, ens),
              "priors.csv": priors_table(case), **calibration_tables(case, ens, cal, seed)}
    manifest = run_header(case, command or ["python", "impact.api.calibrate"], ("calibrate",),
                          started_utc=started.isoformat(timespec="seconds"), seconds=round(time.monotonic() - t0, 2),
                          seed=seed, members=len(ens.draws), counts=ens.counts, calibration=cal.record())
    return PosteriorEnsemble(case, ens, cal, manifest, tables)


def save_ensemble(post: PosteriorEnsemble, out, *, replace: bool = False) -> Path:
    """Write a posterior ensemble folder: ensemble.npz, parameters.csv, calibration/, manifest.json, README.md."""
    from impact.store.dictionary import write_dictionary
    from impact.store.outfolder import OutputFolder
    from impact.store.results import write_csv, write_ensemble, write_json

    folder = OutputFolder(out, replace=replace)
    with folder:
        with folder.stage() as tmp:
            write_ensemble(tmp, post.ensemble.draws, post.ensemble.unit, post.ensemble.today)
            for rel, frame in post.tables.items():
                write_csv(frame, tmp / rel)
            write_json(post.manifest, tmp / "manifest.json")
            write_dictionary(tmp)
    return folder.path


def load_ensemble(folder, case: Case) -> PosteriorEnsemble:
    """Read a folder written by :func:`save_ensemble` for ``case``; refused when calibrated for another case file."""
    import json

    from impact.store.verify import check_folder
    from impact.model import build_web
    from impact.store.results import read_ensemble, read_table

    folder = Path(folder)
    path = folder / "manifest.json"
    try:
        manifest = json.loads(path.read_bytes().decode("utf-8"))
        record, sha = manifest["calibration"], manifest["case"]["sha256"]
    except FileNotFoundError:
        raise ReadError(str(folder), "manifest.json", "not found; point at a folder written by `impact calibrate`") from None
    except (ValueError, KeyError, TypeError) as exc:
        raise ReadError(str(path), "", f"is not the manifest of a posterior ensemble ({exc})") from None
    if sha != case.sha256:
        raise SettingError("ensemble", f"{folder} was calibrated for another version of the case file "
                                       f"({manifest['case'].get('path')}); calibrate {case.path} again")
    check = check_folder(folder)
    if check.changed or check.missing:
        rel = (check.changed + check.missing)[0]
        raise ReadError(str(folder / rel), "", f"differs from what `impact calibrate` wrote (SHA-256 in inventory.json): "
                                               f"altered or damaged; calibrate {case.path} again")
    arrays = read_ensemble(folder, parameters=unit_columns(case), state=build_web(case).n_state)
    tables = {f"calibration/{p.name}": read_table(p) for p in sorted((folder / "calibration").glob("*.csv"))}
    gens = tables.get("calibration/generations.csv")
    cal = calibration_from_record(record, gens.to_dict("records") if gens is not None else None)
    ens = ensemble_from_arrays(case, arrays["draws"], arrays["unit"], arrays["today"], manifest.get("counts", {}))
    return PosteriorEnsemble(case, ens, cal, manifest, tables, str(folder.resolve()))


class _StageClock:
    """Wall seconds of each stage of a run, for the manifest (where the time went)."""

    def __init__(self, start: float):
        self.last = start
        self.seconds: dict[str, float] = {}

    def lap(self, stage: str):
        now = time.monotonic()
        self.seconds[stage] = round(now - self.last, 2)
        self.last = now


def as_case(case: Case | str | Path) -> Case:
    """``case`` itself, or the case file at that path read and validated (:class:`CaseError` naming the field)."""
    if isinstance(case, Case):
        return case
    if isinstance(case, (str, Path)):
        return load_case(case)
    raise SettingError("case", f"must be a case read by load_case or the path of a case file, not {type(case).__name__}")


def assess(case: Case | str | Path, settings: AssessSettings | None = None, *, members: int | None = None,
           seed: int | None = None, sensitivity: bool | None = None, base_samples: int | None = None,
           dynamics: bool | None = None, progress: Progress | None = None, executor=None, store=None,
           block: int | None = None, chunk: int | None = None, command: list[str] | None = None,
           ensemble: PosteriorEnsemble | None = None) -> Assessment:
    """Run the whole assessment of ``case`` in memory and return it.

    Parameters
    ----------
    case : Case or path
        A case read by :func:`load_case`, or the path of a case file.
    settings : AssessSettings, optional
        What to run; the keywords ``members``, ``seed``, ``sensitivity``, ``base_samples`` and
        ``dynamics`` override its fields one by one (see :class:`AssessSettings`).
    executor : object with ``map(fn, tasks)``, optional
        Where chunks are computed (default: this process); see :mod:`impact.run.execute`.
    store : impact.store.results.Checkpoints, optional
        Finished chunks are saved there and reused by a resumed run.
    block, chunk : int, optional
        Draw indices per screening block and members per run chunk; results never depend on them.
    command : list of str, optional
        How the run was asked for, recorded in the manifest (default: a note that it came from Python).
    ensemble : PosteriorEnsemble, optional
        A calibrated ensemble to reuse (from :func:`calibrate` or :func:`load_ensemble`) instead of
        drawing one; ``settings.members``, if given, must equal its size.
    """
    from impact.run.execute import InProcess

    case = as_case(case)
    overrides = dict(members=members, seed=seed, sensitivity=sensitivity, base_samples=base_samples, dynamics=dynamics)
    settings = replace(settings or AssessSettings(), **{k: v for k, v in overrides.items() if v is not None})
    executor = executor or InProcess()
    settings = settings.resolved(case, ensemble)
    _compile_aside(case, flow=settings.dynamics, lanes=settings.members >= LANES_ASIDE_MEMBERS)
    with _helpers_ended():
        return _assessment(case, settings, progress, executor, store, block, chunk, command, ensemble)


@contextmanager
def _helpers_ended():
    """End the compile helpers of :func:`_compile_aside` with the run: all of them when it fails or
    is stopped; on success those whose work only this run needed (the block engine's helper, whose
    work serves later runs, finishes it)."""
    from impact.engine.generate import stop_compiling

    try:
        yield
    except BaseException:
        stop_compiling()
        raise
    stop_compiling(keep=("lanes",))


def _engine_at_hand(case: Case) -> str:
    """The engine "auto" takes now for the case's web (:func:`impact.engine.web.ready_engine`)."""
    from impact.engine.web import AUTO_ENGINE, pack_structure, ready_engine
    from impact.model import build_web

    return ready_engine(pack_structure(build_web(case)), AUTO_ENGINE)


# From this many members a run has the block engine (impact.engine.lanes) compiled aside for the
# runs after it, when the kernel cache lacks it: its machine code serves every later run of the
# structure, and a small run would not repay the processor time
LANES_ASIDE_MEMBERS = 500
# IMPACT_LANES_ASIDE=0 in the environment: no run starts that helper (e.g. a test suite, whose many
# short runs on many webs would each leave one compiling beside the next)
LANES_ASIDE_SWITCH = "IMPACT_LANES_ASIDE"


def _compile_aside(case: Case, flow: bool, lanes: bool):
    """Have kernels compiled in low-priority helper processes from the start of the run, when they
    are not cached (:func:`impact.engine.generate.compile_aside`): the regime screen's tangent flow
    (``flow``), which the run waits for when it comes to it, and the block engine (``lanes``),
    which this run uses only if it is ready in time (the engine "auto" of :mod:`impact.engine.web`)
    and which is left to finish for later runs."""
    lanes = lanes and os.environ.get(LANES_ASIDE_SWITCH, "1") != "0"
    if not (flow or lanes):
        return
    from impact.engine.boundary import structure_sizes
    from impact.engine.generate import compile_aside, compile_flow_aside
    from impact.engine.lanes import lanes_ready
    from impact.engine.web import pack_structure
    from impact.model import build_web

    st = pack_structure(build_web(case))  # every web has a compiled J·v (impact.model.terms)
    n_coef = structure_sizes(st)["P"]  # the width of its coefficient rows, read from the structure
    if flow:
        compile_flow_aside(st, n_coef)
    if lanes and not lanes_ready(st):
        compile_aside(st, "lanes", n_coef)


def _assessment(case: Case, settings: AssessSettings, progress, executor, store, block, chunk, command,
                ensemble) -> Assessment:
    """:func:`assess` once its settings are resolved."""
    members, seed = settings.members, settings.seed
    started, t0 = datetime.now(timezone.utc), time.monotonic()
    engine_at_start = _engine_at_hand(case)
    if ensemble is not None:
        ens, cal = ensemble.ensemble, ensemble.calibration
    else:
        ens, cal = build_ensemble(case, members, seed, progress=progress, executor=executor, store=store, block=block)
    clock = _StageClock(t0)
    clock.lap("ensemble")
    runs = assess_members(case, ens, seed, progress=progress, executor=executor, store=store, chunk=chunk)
    clock.lap("option_runs")
    if progress:
        progress("tabulating risk")
    tables = {
        "risk.csv": risk_table(case, runs), "effects.csv": effects_table(case, runs),
        "objectives.csv": objectives_table(case, runs), "comparisons.csv": comparisons_table(case, runs),
        "bands.csv": bands_table(case, runs), "members.csv": members_table(case, ens, runs),
        "parameters.csv": parameters_table(case, ens),
        "priors.csv": priors_table(case),
        **({k: v for k, v in ensemble.tables.items() if k.startswith("calibration/")} if ensemble is not None
           else calibration_tables(case, ens, cal, seed)),
        **structure_tables(case, runs, ens.unit, cal.generations if cal is not None else None),
        **eradication_tables(case, ens.values, ens.draws, runs)}
    clock.lap("tables")
    calibration = cal.record() if ensemble is None else {
        **ensemble.manifest["calibration"], "reused_from": ensemble.source or "this process"}
    out = StageOutput(tables, stages=("assess",))
    sensitivity = None
    if settings.sensitivity:
        decided = decision_stage(case, settings, seed, ens, runs, progress, executor, store)
        out, sensitivity = out.merged(decided), decided.entry
        clock.lap("sensitivity")
    if settings.dynamics:
        out = out.merged(dynamics_stage(case, ens, runs, seed, progress, executor))
        clock.lap("dynamics")
    tables, records, stages = out.tables, out.records, list(out.stages)
    engine_at_end = _engine_at_hand(case)
    execution = {**executor.describe(), "chunks_reused": getattr(store, "reused", 0),
                 "chunks_computed": getattr(store, "saved", 0), "stage_seconds": clock.seconds,
                 "engine": engine_at_start if engine_at_start == engine_at_end else f"{engine_at_start}, then {engine_at_end}"}
    manifest = manifest_for(case, ens, failure_counts(runs), seed, command or ["python", "impact.api.assess"], started,
                            time.monotonic() - t0, tuple(stages), sensitivity, execution, calibration)
    return Assessment(case, ens, manifest, tables, records, calibration=cal)


def summary_text(case: Case, folder: Path) -> str:
    """The terminal summary of a written results folder: the page-1 verdict, ending with its bottom line."""
    from impact.dossier import hinges_text, load_results
    from impact.dossier.bottomline import bottom_line, bottom_line_text
    from impact.dossier.studyline import best_study_sentence
    from impact.dossier.eradication_reading import eradication_sentences
    from impact.dossier.formatting import by_time, fmt_bare_prob, fmt_change, fmt_num, fmt_prob
    from impact.dossier.verdict import reading, reading_text, thin_run
    from impact.dossier.structures_verdict import structure_reading, structure_text

    res = load_results(folder)
    counts, risk = res.manifest.counts, res.risk
    L = [case.title]
    cal = res.manifest.calibration or {}
    if cal.get("sampler") == "smc":
        # the same rounding as the PDF's calibration section (impact.dossier.formatting)
        L.append(f"ensemble: {counts.kept} members calibrated by sequential Monte Carlo ({cal['simulations']} "
                 f"simulations in {cal['generations']} generations, move acceptance {fmt_prob(cal['acceptance'])}, "
                 f"{fmt_prob(cal['distinct'])} distinct members; {fmt_prob(cal['prior_acceptance'])} of prior draws "
                 "met every constraint)")
    else:
        L.append(f"draws: {counts.tried} tried, {counts.kept} plausible kept ({counts.failed} failed "
                 f"numerically, {counts.extinct} lost a species, {counts.out_of_range} outside observed ranges)")
    if case.monitoring:
        L.append("monitoring data weighed: " + ", ".join(f"{s.species} ({len(s.times)} {s.kind} values, {s.error})"
                                                          for s in case.monitoring))
    if counts.kept < counts.wanted:
        L.append(f"WARNING: only {counts.kept} of {counts.wanted} wanted members were plausible within the draw limit")
    for opt, f in counts.failed_by_option.items():
        if f["failed"]:
            L.append(f"WARNING: {f['failed']} members failed numerically under {opt}: "
                     + ", ".join(f"{k} {v}" for k, v in f.items() if k != "failed"))
    H = case.horizon
    L.append(f"quasi-extinction probability {by_time(H, case.time_unit)} [{fmt_num(100 * case.risk.confidence)} % CI], "
             "and median change in mean abundance vs baseline:")
    width = max(len(s) for s in case.species_names)
    for sp in case.species_names:
        cells = []
        for opt in ["baseline", *[o.name for o in case.options]]:
            r = risk[(risk.option == opt) & (risk.species == sp) & np.isclose(risk.horizon, H)]
            q, d = r[r.metric == "quasi_extinction"], r[r.metric == "mean_change"]
            cell = (f"{fmt_prob(q.value.iloc[0])} [{fmt_bare_prob(q.low.iloc[0])}, {fmt_bare_prob(q.high.iloc[0])}]"
                    if len(q) else "n/a")
            change = float(d.value.iloc[0]) if len(d) else float("nan")
            # no paired change exists for a species absent without the option (an introduction)
            cells.append(f"{opt}: {cell}" + (f" {fmt_change(change)}" if np.isfinite(change) else ""))
        L.append(f"  {sp:<{width}}  " + " | ".join(cells))
    absent = [s.name for s in case.species if not s.present]
    if absent:
        L.append(f"  (n/a: no quasi-extinction chance or paired change for a species absent today: {', '.join(absent)})")
    L.append("verdict (the same as page 1 of report.pdf):")
    L.append(reading_text(reading(res.manifest, res.risk, res.effects, res.objectives, res.comparisons)))
    # across the structural doubts (impact.dossier.structures_verdict): empty for a case without doubts
    across = structure_text(structure_reading(res.manifest, res.risk, res.effects, res.objectives, res.structures))
    if across:
        L.append(across)
    hinges = hinges_text(res)
    if hinges:
        L += ["what the decision hinges on (plausible members):", hinges]
    erad = eradication_sentences(res.manifest, res.eradication) if not thin_run(res.manifest)[0] else ()
    if erad:
        L += ["eradication (the same as page 1):", *(f"  {x}" for x in erad)]
    L.append("CAUTION: " + CAUTION)
    if not thin_run(res.manifest)[0]:  # the summary ends with the bottom line that opens page 1
        L.append(bottom_line_text(bottom_line(res.manifest, res.objectives, res.comparisons)))
        line = best_study_sentence((res.sensitivity or {}).get("studies"), res.manifest.judgement.material_risk)
        if line:  # the sentence under page 1's bottom line
            L.append(f"  {line}")
    return "\n".join(L)


def write_results(result: Assessment, folder: Path, *, report: bool = True, paper: str = "a4",
                  progress: Progress | None = None) -> str:
    """Write an assessment into an empty staging folder: tables, manifest, report.pdf and summary.txt.

    Returns the summary text. Use :func:`save` to write into a results folder with its lock and policy.
    """
    from impact.dossier import write_report

    from impact.store.dictionary import write_dictionary
    from impact.store.outfolder import write_inventory

    folder = Path(folder)
    result.write(folder)
    write_dictionary(folder)
    text = summary_text(result.case, folder)
    (folder / "summary.txt").write_text(text + "\n", encoding="utf-8")
    # the inventory (every file's SHA-256) before the report, whose first page states its hash
    write_inventory(folder, ("report.pdf", "report.pdf.sha256") if report else ())
    if report:
        if progress:
            progress("writing report.pdf")
        write_report(folder, folder / "report.pdf", paper=paper)
    return text


def save(result: Assessment, out, *, replace: bool = False, report: bool = True, paper: str = "a4") -> Path:
    """Save an assessment as a results folder (locked while written; an existing one only with ``replace``)."""
    from impact.store.outfolder import OutputFolder

    if result.case is None:
        raise SettingError("result", "was read from a folder without its case file; load that case and assess it again")

    folder = OutputFolder(out, replace=replace)
    with folder:
        with folder.stage() as tmp:
            write_results(result, tmp, report=report, paper=paper)
    return folder.path


def load(folder) -> Assessment:
    """Read a results folder back, every table checked against the results schema: an :class:`Assessment`.

    Its ``case`` is read from the case file the manifest names when that file is still there and
    unchanged (same SHA-256), and is None otherwise; its ``ensemble`` is None.
    """
    import json

    from impact.case import load_case as read_case
    from impact.errors import CaseError
    from impact.store.results import load_results, read_table

    res = load_results(folder)  # the manifest and the core tables, checked
    tables = {str(p.relative_to(res.path)): read_table(p)
              for p in sorted(res.path.glob("*.csv")) + sorted(res.path.glob("*/*.csv"))}
    records = {}
    for p in sorted(res.path.glob("*/*.json")):
        try:
            records[str(p.relative_to(res.path))] = json.loads(p.read_bytes().decode("utf-8"))
        except (ValueError, OSError) as exc:
            raise ReadError(str(p), "", f"is not readable JSON ({exc}); the results folder is damaged") from None
    case = None
    recorded = Path(res.manifest.case.path)
    if recorded.is_file():
        try:
            read = read_case(recorded)
            case = read if read.sha256 == res.manifest.case.sha256 else None
        except CaseError:
            case = None
    return Assessment(case, None, res.manifest, tables, records, folder=res.path)


def report(folder, out=None, paper: str = "a4", accept_edits: bool = False) -> Path:
    """Build ``report.pdf`` (or ``out``) of a saved results folder: :func:`build_report`."""
    return build_report(folder, out, paper=paper, accept_edits=accept_edits)


def build_report(folder, out=None, paper: str = "a4", accept_edits: bool = False) -> Path:
    """Build ``report.pdf`` (or ``out``) from a saved results folder alone.

    Writing into the results folder takes its lock, so a report is never written while another
    run replaces that folder (that run is named in the refusal). A table that no longer matches
    the SHA-256 ``inventory.json`` records is refused (:class:`ReadError`) unless
    ``accept_edits``; page 1 then names the edited files.
    """
    from impact.store.outfolder import OutputFolder
    from impact.dossier import write_report

    folder = Path(folder)
    target = Path(out) if out is not None else folder / "report.pdf"
    if not folder.is_dir() or target.resolve().parent != folder.resolve():
        return write_report(folder, target, paper=paper, accept_edits=accept_edits)
    with OutputFolder(folder, replace=True):
        return write_report(folder, target, paper=paper, accept_edits=accept_edits)


def verify(folder, pdf=None):
    """Check a results folder against the SHA-256 of its ``inventory.json``, and a PDF against the
    folder (default: its ``report.pdf``): an :class:`impact.store.verify.Verification` (``ok``, ``lines``)."""
    from impact.store.verify import verify as check

    return check(folder, pdf)
