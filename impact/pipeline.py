"""Whole runs that end in a results folder: an assessment, a prior screen, a bifurcation scan.

Each function checks every setting before anything is computed or written, takes the folder's
lock, keeps the executor's workers from outliving an error, and moves finished results into
place only when complete (see :mod:`impact.store.outfolder`). The command line is a thin shell over
these: it parses flags into the settings below, prints, and maps :class:`SettingError`
parameters to its flags.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from impact.version import __version__
from impact.api import AssessSettings, Assessment, Progress, assess, prior_screen, run_header, write_results
from impact.case import Case, unused_parameters
from impact.errors import CaseError, SettingError
from impact.run.preload import DYNAMICS_LIBRARIES, REPORT_LIBRARIES, SENSITIVITY_LIBRARIES, preload


@dataclass(frozen=True)
class Execution:
    """Where and how chunks are computed; results never depend on it.

    Attributes
    ----------
    workers : int, optional
        Local workers (default: the machine's cores; 1 computes in this process alone).
    processes : bool
        Local workers are processes rather than threads of this process. Threads are the
        default: the compiled engine releases Python's lock, so they share the cores with
        nothing copied between them; processes also run the Python between kernel calls side by side.
    cluster : str, optional
        Address of a Dask scheduler; its workers compute instead of local ones.
    chunk_members : int, optional
        Members per chunk of the option runs (default: sized to the workers).
    """

    workers: int | None = None
    cluster: str | None = None
    chunk_members: int | None = None
    processes: bool = False

    def check(self) -> None:
        if self.workers is not None and self.workers < 1:
            raise SettingError("workers", f"must be at least 1, got {self.workers}")
        if self.chunk_members is not None and self.chunk_members < 1:
            raise SettingError("chunk_members", f"must be at least 1, got {self.chunk_members}")
        if self.processes and self.cluster:
            raise SettingError("processes", "applies to workers on this machine; a cluster's workers are its own")

    def executor(self):
        from impact.run.execute import make_executor

        return make_executor(self.workers, self.cluster, self.processes)


@dataclass
class Written:
    """A results folder a run has written.

    Attributes
    ----------
    path : Path
        The results folder.
    replaced, kept : list of str
        Files of an earlier run that were replaced, and other files left in place (``replace_results``).
    stale_lock : dict, optional
        The record of a dead run whose lock was taken over.
    summary : str
        The terminal summary (for an assessment, ending with the page-1 verdict).
    result : Assessment, optional
        The assessment in memory (assessments only).
    tables : dict of str to DataFrame
        The tables written, by relative path (scans and prior screens).
    """

    path: Path
    replaced: list[str] = field(default_factory=list)
    kept: list[str] = field(default_factory=list)
    stale_lock: dict | None = None
    summary: str = ""
    result: Assessment | None = None
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)


def case_warnings(case: Case) -> list[str]:
    """What a valid case may still get wrong: parameters no field uses (sampled and reported, but
    they change nothing), and units that name another time unit or abundance unit than the field."""
    from impact.case.units import unit_warnings

    return ([f"{case.path}: parameters.{n}: declared but no field uses it; it is sampled and appears in the "
             f"sensitivity tables as a parameter without influence (remove it, or keep it as a dummy)"
             for n in unused_parameters(case)]
            + [f"{case.path}: {w}" for w in unit_warnings(case)])


def plan_assessment(case: Case, settings: AssessSettings, out, *, replace: bool = False,
                    execution: Execution = Execution(), ensemble=None):
    """Check every setting, the results folder and the resource estimate; touch nothing on disk.

    Returns
    -------
    settings : AssessSettings
        With the case's members and seed filled in.
    folder : impact.store.outfolder.OutputFolder
        Checked against the folder policy, not yet locked.
    estimate : impact.risk.budget.Estimate
    """
    from impact.risk.budget import check_fits, estimate
    from impact.run.execute import machine_cores
    from impact.store.outfolder import OutputFolder

    given = settings.members is not None
    settings = settings.resolved(case, ensemble)
    execution.check()
    folder = OutputFolder(out, replace=replace)
    workers = 1 if execution.cluster else (execution.workers or machine_cores())
    est = estimate(case, settings.members, workers, out=folder.path)
    check_fits(est, case, members_given=given)
    return settings, folder, est


def assess_to_folder(case: Case, settings: AssessSettings, out, *, replace: bool = False, resume: bool = False,
                     report: bool = True, paper: str = "a4", execution: Execution = Execution(),
                     progress: Progress | None = None, command: list[str] | None = None,
                     ensemble=None) -> Written:
    """Run an assessment and write its results folder (tables, manifest, report.pdf, summary.txt).

    Parameters
    ----------
    out : path
        The results folder: new or empty, or an earlier results folder with ``replace``.
    resume : bool
        Reuse the chunks an interrupted run with the same settings saved beside ``out``.
    command : list of str, optional
        How the run was asked for, recorded in the manifest.
    ensemble : impact.api.PosteriorEnsemble, optional
        A calibrated ensemble to assess (from :func:`calibrate_to_folder`) instead of drawing one.
    """
    from impact.ensemble.draws import draw_block_size, run_chunk_size
    from impact.store.results import Checkpoints

    settings, folder, est = plan_assessment(case, settings, out, replace=replace, execution=execution,
                                            ensemble=ensemble)
    # the later stages' libraries load while the compiled stages run
    preload((SENSITIVITY_LIBRARIES if settings.sensitivity else ()) + (DYNAMICS_LIBRARIES if settings.dynamics else ())
            + (REPORT_LIBRARIES if report else ()))
    if progress:
        progress(est.describe())
    # interrupted or failed: the workers end now and the saved chunks stay
    with execution.executor() as executor, folder:  # the lock: one run per results folder
        if folder.stale_lock and progress:
            progress(f"took over the lock of a run that is gone (pid {folder.stale_lock.get('pid')})")
        # a resumed run keeps the chunking of the run it continues (results never depend on it)
        earlier = Checkpoints.previous(folder.path) if resume else None
        chunk = ((earlier or {}).get("run_chunk") or execution.chunk_members
                 or run_chunk_size(settings.members, executor.workers, runs=1 + len(case.options)))
        block = (earlier or {}).get("draw_block") or draw_block_size(settings.members, executor.workers)
        fingerprint = {"version": __version__, "case_sha256": case.sha256, "seed": settings.seed,
                       "members": settings.members, "max_draws": case.max_draws, "draw_block": block,
                       "run_chunk": chunk,
                       "sensitivity": {"base_samples": settings.base_samples} if settings.sensitivity else None,
                       "ensemble": None if ensemble is None else ensemble.source}
        store = Checkpoints(folder.path, fingerprint, resume=resume)
        saved = len(list(store.dir.glob("*.npz"))) if resume else 0
        if saved and progress:
            progress(f"resuming from {saved} saved chunks in {store.dir}")
        try:
            result = assess(case, settings, progress=progress, executor=executor, store=store, block=block,
                            chunk=chunk, command=command, ensemble=ensemble)
        except CaseError:
            store.discard()  # the input itself is at fault (no plausible draw, say): nothing to resume
            raise
        with folder.stage() as tmp:
            text = write_results(result, tmp, report=report, paper=paper, progress=progress)
        store.discard()
    return Written(folder.path, folder.replaced, folder.kept, folder.stale_lock, text, result)


def calibrate_to_folder(case: Case, out, *, members: int | None = None, seed: int | None = None,
                        replace: bool = False, execution: Execution = Execution(),
                        progress: Progress | None = None, command: list[str] | None = None) -> Written:
    """Build the (posterior) ensemble of ``case`` alone and write it for later assessments to reuse."""
    from impact.api import calibrate, save_ensemble
    from impact.store.outfolder import OutputFolder

    settings = AssessSettings(members=members, seed=seed, sensitivity=False).resolved(case)
    execution.check()
    OutputFolder(out, replace=replace)  # refuse a bad folder before any simulation
    with execution.executor() as executor:
        post = calibrate(case, settings.members, settings.seed, progress=progress, executor=executor,
                         command=command)
        path = save_ensemble(post, out, replace=replace)
    c = post.manifest["calibration"]
    summary = (f"{len(post.ensemble.draws)} members built by {c['sampler']}: {c['simulations']} simulations, "
               f"acceptance {c['acceptance']:.1%}, {c['seconds']:.1f} s")
    return Written(path, summary=summary)


def screen_to_folder(case: Case, settings, out, *, replace: bool = False, execution: Execution = Execution(),
                     progress: Progress | None = None, command: list[str] | None = None) -> Written:
    """The Sobol screen of the prior box alone, written to a results folder.

    Parameters
    ----------
    settings : impact.decision.sensitivity.Settings
        The screen's design and thresholds (checked before anything runs).
    """
    from impact.store.outfolder import OutputFolder
    from impact.store.results import write_csv, write_json
    from impact.decision.sensitivity import check_settings

    check_settings(settings)
    execution.check()
    folder = OutputFolder(out, replace=replace)
    with execution.executor() as executor, folder, folder.stage() as tmp:
        found = prior_screen(case, settings, progress, executor)
        tables, records, entry = found.tables, found.records, found.entry
        for rel, frame in tables.items():
            write_csv(frame, tmp / rel)
        for rel, rec in records.items():
            write_json(rec, tmp / rel)
        summary = (f"prior screen: {entry['runs']} runs, N = {entry['N']}; {entry['not_converged']} outputs not "
                   f"converged; indices conditional on: {entry['conditional_on']}")
        write_json(run_header(case, command, ("sensitivity",), seed=settings.seed, sensitivity=entry,
                              execution=executor.describe()), tmp / "manifest.json")
    return Written(folder.path, folder.replaced, folder.kept, folder.stale_lock, summary, tables=tables)


@dataclass(frozen=True)
class ScanSettings:
    """A bifurcation scan: one quantity over an even grid, every other parameter at its prior median.

    Attributes
    ----------
    parameter : str
        An uncertain parameter, or an intervention's intensity (``NAME.FIELD``).
    start, stop : float
        The grid's ends (``stop > start``), in the quantity's unit.
    steps : int
        Grid values (at least 2).
    option : str, optional
        The option whose interventions act during the scan (needed to scan an intensity).
    section : str, optional
        The species whose successive maxima form the Poincaré section.
    transient, window, sample_dt : float, optional
        Time (case units) discarded, diagnosed, and between stored samples; ``None`` takes the
        case's ``[dynamics]`` table or the web's own time scales.
    max_period : int, optional
        Longest period sought (1 to 64).
    period_tol : float, optional
        Relative tolerance of a repeat, in units of the oscillation's amplitude (0 to 1].
    continuation : bool
        Each value starts where the previous one ended (follows a branch; hysteresis shows).
    """

    parameter: str
    start: float
    stop: float
    steps: int
    option: str | None = None
    section: str | None = None
    transient: float | None = None
    window: float | None = None
    sample_dt: float | None = None
    max_period: int | None = None
    period_tol: float | None = None
    continuation: bool = True

    def check(self) -> None:
        if self.steps < 2:
            raise SettingError("steps", f"must be at least 2, got {self.steps}")
        if not self.stop > self.start:
            raise SettingError("stop", f"must be greater than `start` ({self.start:g}), got {self.stop:g}")
        for name in ("transient", "window", "sample_dt"):
            v = getattr(self, name)
            if v is not None and not (v >= 0 if name == "transient" else v > 0):
                raise SettingError(name, f"must be a positive time, got {v:g}")
        if self.max_period is not None and not 1 <= self.max_period <= 64:
            raise SettingError("max_period", f"must be a whole number from 1 to 64, got {self.max_period}")
        if self.period_tol is not None and not 0 < self.period_tol <= 1:
            raise SettingError("period_tol", f"must be greater than 0 and at most 1, got {self.period_tol:g}")


def scan_to_folder(case: Case, scan: ScanSettings, out, *, replace: bool = False, execution: Execution = Execution(),
                   progress: Progress | None = None, command: list[str] | None = None) -> Written:
    """Run a bifurcation scan and write ``dynamics/scan.csv``, ``scan_points.csv``, ``transitions.csv``."""
    from impact.dynamics.lyapunov import declared_settings, section_species, settings_record
    from impact.store.outfolder import OutputFolder
    from impact.store.results import write_csv, write_json
    from impact.dynamics.scan import scan_web

    scan.check()
    execution.check()
    _, section = section_species(case, scan.section)
    settings, declared = declared_settings(case, transient=scan.transient, window=scan.window,
                                           sample_dt=scan.sample_dt, max_period=scan.max_period,
                                           period_tol=scan.period_tol)
    grid = np.linspace(scan.start, scan.stop, scan.steps)
    folder = OutputFolder(out, replace=replace)
    t0 = time.monotonic()
    with folder, folder.stage() as tmp:
        with execution.executor() as executor:
            table, points, trans = scan_web(case, scan.parameter, grid, settings, option=scan.option,
                                            executor=executor, section=section, continuation=scan.continuation,
                                            progress=progress)
        tables = {"dynamics/scan.csv": table, "dynamics/scan_points.csv": points, "dynamics/transitions.csv": trans}
        for rel, frame in tables.items():
            write_csv(frame, tmp / rel)
        seconds = time.monotonic() - t0
        write_json(settings_record(settings, parameter=scan.parameter, values=grid.tolist(), option=scan.option,
                                   execution=executor.describe(), section=f"maxima of {section}",
                                   continuation=scan.continuation, others="every other parameter at its prior median",
                                   declared=declared, seconds=round(seconds, 2), failed=int(points.failed.sum())),
                   tmp / "dynamics" / "dynamics.json")
        write_json(run_header(case, command, ("scan",), seconds=round(seconds, 2), execution=executor.describe()),
                   tmp / "manifest.json")
    summary = f"{len(grid) / max(seconds, 1e-9):.2f} values per second"
    return Written(folder.path, folder.replaced, folder.kept, folder.stale_lock, summary, tables=tables)
