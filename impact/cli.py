"""Command-line interface: the only module that parses arguments or prints."""

from __future__ import annotations

import argparse
import signal
import sys
import time
from pathlib import Path

import numpy as np

from . import __version__
from .api import AssessSettings, assess, package_versions, prior_screen, write_results
from .case import Case, load_case, schedule_text
from .effects import event_text
from .errors import CaseError, WriteError
from .execute import WorkerLost
from .outfolder import REPLACE_FLAG

# exit status of `impact assess` when the results are written but too thin for a verdict
# (fewer plausible members than risk.min_members); 2 stays reserved for bad input
EXIT_NO_VERDICT = 3

class _Progress:
    """Progress lines on stderr: stage messages, and counts with rate and time left.

    Silent with ``--quiet`` or when stderr is not a terminal (logs and pipes stay clean).
    """

    def __init__(self, quiet: bool, stream=None):
        self.stream = stream or sys.stderr
        self.quiet = quiet or not getattr(self.stream, "isatty", lambda: False)()
        self.t0 = time.monotonic()
        self.last = 0.0
        self.started: dict[str, tuple[float, int]] = {}

    def __call__(self, msg: str, force: bool = False):
        now = time.monotonic()
        if self.quiet or (not force and now - self.last < 0.5):
            return
        self.last = now
        print(f"[{now - self.t0:6.1f} s] {msg}", file=self.stream, flush=True)

    def count(self, label: str, done: int, total: int, unit: str):
        now = time.monotonic()
        t_first, d_first = self.started.setdefault(label, (now, done))
        finished = done >= total
        if self.quiet or (not finished and now - self.last < 0.5):
            return
        line = f"{label}: {done}/{total} {unit}"
        if now > t_first and done > d_first:
            rate = (done - d_first) / (now - t_first)
            line += f", {rate:.3g}/s"
            if not finished:
                line += f", about {_duration((total - done) / rate)} left"
        self(line, force=True)


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def describe_case(case: Case) -> str:
    """What the tool understood from the case file, as text."""
    L = [f"case: {case.title}", f"file: {case.path} (sha256 {case.sha256[:12]}…)"]
    if case.invented:
        L.append("marked INVENTED: an example, not real site data")
    L.append(f"time: horizon {case.horizon:g} {case.time_unit}, output every {case.output_step:g}, spin-up {case.spinup:g}")
    L.append(f"ensemble: {case.members} members wanted, at most {case.max_draws} draws, seed {case.seed}")
    L.append(f"species ({len(case.species)}):")
    for s in case.species:
        bits = [s.growth]
        if s.growth != "none":
            bits.append(f"r={s.growth_rate}")
        if s.carrying_capacity is not None:
            bits.append(f"K={s.carrying_capacity}")
        if s.mortality != 0.0:
            bits.append(f"m={s.mortality}")
        if s.crowding_mortality != 0.0:
            bits.append(f"crowding mortality={s.crowding_mortality}")
        if s.breeding_season is not None:
            bits.append(f"breeds in {case.seasons.part_name}s {s.breeding_season[0]}–{s.breeding_season[1]} "
                        f"(births × {s.breeding_outside:g} outside)")
        if s.breeding_amplitude is not None:
            bits.append(f"births × (1 + {s.breeding_amplitude}·cos), peaking in {case.seasons.part_name} {s.breeding_peak:g}")
        if s.matures_into is not None:
            bits.append(f"juvenile stage of {s.matures_into} (matures at {s.maturation_rate}/{case.time_unit})")
        bits.append(f"initial={s.initial}")
        if not s.present:
            bits.append("absent today")
        if s.noise_sd != 0.0:
            bits.append(f"noise sd={s.noise_sd}")
        bits.append(f"quasi-extinction<{s.quasi_extinction:g}")
        if s.outbreak is not None:
            bits.append(f"outbreak>{s.outbreak:g}")
        if s.role != "other":
            bits.append(f"role: {s.role}")
        L.append(f"  {s.name} [{s.unit}]: " + ", ".join(str(b) for b in bits))
    L.append(f"interactions ({len(case.feeding) + len(case.competition) + len(case.mutualism)}):")
    for f in case.feeding:
        gamma = f", interference={f.interference}" if f.response == "beddington-deangelis" else ""
        L.append(f"  {f.kind}: {f.consumer} eats {f.resource} ({f.response}; a={f.attack_rate}, h={f.handling_time}, "
                 f"e={f.efficiency}{gamma})")
    for c in case.competition:
        L.append(f"  competition: {c.competitor} crowds {c.species} (alpha={c.coefficient})")
    for u in case.mutualism:
        if u.obligate:
            L.append(f"  obligate mutualism: {u.beneficiary} breeds only with {u.partner} "
                     f"(births × P/(half-saturation + P), half-saturation={u.half_saturation})")
        else:
            L.append(f"  mutualism: {u.partner} benefits {u.beneficiary} (max={u.max_benefit}, "
                     f"half-saturation={u.half_saturation}; carrying capacity up to K·(1 + max))")
    if case.seasons is not None:
        sea = case.seasons
        L.append(f"seasons: {sea.length:g} {case.time_unit} in {sea.parts} {sea.part_name}s; today starts a season")
    if case.carrion is not None:
        L.append(f"carrion pool: decay rate {case.carrion.decay_rate}")
    L.append(f"parameters ({len(case.parameters)}, {len(case.uncertain)} uncertain):")
    for p in case.parameters:
        L.append(f"  {p.name} = {p.prior.describe()} [{p.unit or 'no unit given'}]" + (f"  source: {p.source}" if p.source else "  (no source given)"))
    L.append(f"observed today ({len(case.observed)}):")
    for o in case.observed:
        L.append(f"  {o.species} in [{o.low:g}, {o.high:g}]" + (f"  source: {o.source}" if o.source else ""))
    L.append(f"interventions ({len(case.interventions)}):")
    for iv in case.interventions:
        when = f"at {iv.start:g}" if iv.start == iv.end else f"{iv.start:g}–{iv.end:g}"
        if iv.kind == "pulse-cull":
            when = "at " + ", ".join(f"{t:g}" for t in iv.times)
        when += f" {case.time_unit}"
        if iv.season_parts is not None:
            when += ", " + schedule_text(case, iv)
        what = f" ({iv.sterile_density} sterile × competitiveness {iv.competitiveness})" if iv.kind == "sterile-release" else ""
        L.append(f"  {iv.name}: {iv.kind} of {iv.species}{what} {when}")
    L.append("options: " + "; ".join(f"{o.name} = {' + '.join(o.interventions)}" for o in case.options))
    L.append(f"risk horizons: {', '.join(f'{h:g}' for h in case.risk.horizons)} {case.time_unit}; "
             f"recovery to {case.risk.recovery_fraction:.0%} of baseline; {case.risk.confidence:.0%} intervals")
    L.append(f"objectives ({len(case.objectives)}):" if case.objectives else
             "objectives: none declared (the verdict reports effects on every species, with no objective judged)")
    for o in case.objectives:
        L.append(f"  {o.name}: {event_text(case, o)}; {o.requirement.replace('_', ' ')} {o.bound:g}")
    L.append(f"material: a paired change of ±{case.risk.material_change:.0%} in mean abundance (unless a species sets "
             f"its own), {100 * case.risk.material_risk:g} points in a quasi-extinction or outbreak chance; "
             f"no verdict below {case.risk.min_members} plausible members")
    return "\n".join(L)


def cmd_check(args) -> int:
    from .budget import check_fits, estimate
    from .case import unused_parameters
    from .execute import machine_cores

    case = load_case(args.case)
    print(describe_case(case))
    for line in _unused_warnings(case, unused_parameters(case)) + _unit_warnings(case):
        print(line)
    est = estimate(case, case.members, machine_cores())
    print(est.describe())
    check_fits(est, case, (case.path, "case.members"))
    print("case file is valid.")
    return 0


def _unused_warnings(case: Case, names) -> list[str]:
    """Declared parameters no field uses: sampled and reported, but they change nothing."""
    return [f"warning: {case.path}: parameters.{n}: declared but no field uses it; it is sampled and appears "
            f"in the sensitivity tables as a parameter without influence (remove it, or keep it as a dummy)"
            for n in names]


def _unit_warnings(case: Case) -> list[str]:
    """Parameters whose unit names another time unit than the field they feed."""
    from .units import unit_warnings

    return [f"warning: {case.path}: {w}" for w in unit_warnings(case)]


def _assess_plan(args, case: Case):
    """Check every argument, the output folder and the resource estimate; touch nothing on disk.

    Returns
    -------
    members, seed : int
    folder : impact.outfolder.OutputFolder
        Checked against the --out policy, not yet locked.
    """
    from .budget import check_fits, estimate
    from .case import unused_parameters
    from .execute import machine_cores
    from .outfolder import OutputFolder

    members = args.members if args.members is not None else case.members
    seed = args.seed if args.seed is not None else case.seed
    if members < 1:
        raise CaseError("command line", "--members", "must be at least 1")
    if args.chunk_members is not None and args.chunk_members < 1:
        raise CaseError("command line", "--chunk-members", f"must be at least 1, got {args.chunk_members}")
    if seed < 0:
        raise CaseError("command line", "--seed", "must be a non-negative whole number")
    if args.workers is not None and args.workers < 1:
        raise CaseError("command line", "--workers", f"must be at least 1, got {args.workers}")
    if not getattr(args, "no_sensitivity", False):
        from .sensitivity import Settings, check_settings

        check_settings(Settings(base_samples=args.base_samples, seed=seed))  # fail before any simulation
    folder = OutputFolder(args.out, replace=args.replace_results)
    est = estimate(case, members, 1 if args.cluster else (args.workers or machine_cores()), out=folder.path)
    check_fits(est, case, ("command line", "--members") if args.members is not None else (case.path, "case.members"))
    for line in _unused_warnings(case, unused_parameters(case)) + _unit_warnings(case):
        print(line, file=sys.stderr)
    return members, seed, folder, est


def cmd_assess(args) -> int:
    from .assess import draw_block_size, run_chunk_size
    from .execute import make_executor
    from .results import Checkpoints

    case = load_case(args.case)
    members, seed, folder, est = _assess_plan(args, case)
    progress = _Progress(args.quiet)
    progress(est.describe(), force=True)
    executor = make_executor(args.workers, args.cluster)
    try:
        with folder:  # the lock: one run per output folder
            if folder.stale_lock:
                progress(f"took over the lock of a run that is gone (pid {folder.stale_lock.get('pid')})", force=True)
            # a resumed run keeps the chunking of the run it continues (results never depend on it)
            earlier = Checkpoints.previous(folder.path) if args.resume else None
            chunk = ((earlier or {}).get("run_chunk") or args.chunk_members
                     or run_chunk_size(members, executor.workers, runs=1 + len(case.options)))
            block = (earlier or {}).get("draw_block") or draw_block_size(members, executor.workers)
            fingerprint = {"version": __version__, "case_sha256": case.sha256, "seed": seed, "members": members,
                           "max_draws": case.max_draws, "draw_block": block, "run_chunk": chunk,
                           "sensitivity": None if args.no_sensitivity else {"base_samples": args.base_samples}}
            store = Checkpoints(folder.path, fingerprint, resume=args.resume)
            if args.resume and any(store.dir.glob("*.npz")):
                progress(f"resuming from {len(list(store.dir.glob('*.npz')))} saved chunks in {store.dir}", force=True)
            settings = AssessSettings(members=members, seed=seed, sensitivity=not args.no_sensitivity,
                                      base_samples=args.base_samples, dynamics=not args.no_dynamics)
            try:
                result = assess(case, settings, progress=lambda m: progress(m, force=True), executor=executor,
                                store=store, block=block, chunk=chunk, command=sys.argv)
            except CaseError:
                store.discard()  # the input itself is at fault (no plausible draw, say): nothing to resume
                raise
            with folder.stage() as tmp:
                text = write_results(result, tmp, report=not args.no_report, paper=args.paper,
                                     progress=lambda m: progress(m, force=True))
            store.discard()
    except BaseException:
        executor.abort()  # interrupted or failed: end the workers now, keep the saved chunks
        raise
    executor.close()
    print(text)
    print(f"results written to {folder.path}")
    _say_replaced(folder)
    return EXIT_NO_VERDICT if result.thin else 0


def _say_replaced(folder) -> None:
    if folder.replaced:
        print(f"{REPLACE_FLAG}: replaced {len(folder.replaced)} files impact had written in {folder.path}: "
              + ", ".join(folder.replaced))
    if folder.replaced and folder.kept:
        print(f"kept {len(folder.kept)} other files there: " + ", ".join(folder.kept))


def cmd_report(args) -> int:
    from .report import write_report

    out = write_report(args.results, args.out, paper=args.paper)
    print(f"report written to {out}")
    return 0


def cmd_scan(args) -> int:
    from .dynamics import declared_settings, section_species, settings_record
    from .scan import scan_web
    from .execute import make_executor
    from .outfolder import OutputFolder
    from .results import write_csv, write_json

    case = load_case(args.case)
    if args.steps < 2:
        raise CaseError("command line", "--steps", "must be at least 2")
    if not args.stop > args.start:
        raise CaseError("command line", "--to", f"must be greater than --from ({args.start:g})")
    for flag, v in (("--transient", args.transient), ("--window", args.window), ("--sample-dt", args.sample_dt)):
        if v is not None and not (v > 0 if flag != "--transient" else v >= 0):
            raise CaseError("command line", flag, "must be a positive time")
    if args.max_period is not None and not 1 <= args.max_period <= 64:
        raise CaseError("command line", "--max-period", "must be a whole number from 1 to 64")
    if args.period_tol is not None and not 0 < args.period_tol <= 1:
        raise CaseError("command line", "--period-tol", "must be greater than 0 and at most 1")
    _, section = section_species(case, args.section)
    settings, declared = declared_settings(case, transient=args.transient, window=args.window, sample_dt=args.sample_dt,
                                           max_period=args.max_period, period_tol=args.period_tol)
    grid = np.linspace(args.start, args.stop, args.steps)
    folder = OutputFolder(args.out, replace=args.replace_results)
    progress = _Progress(args.quiet)
    t0 = time.monotonic()
    executor = make_executor(args.workers, args.cluster)
    with folder, folder.stage() as tmp:
        try:
            scan, points, trans = scan_web(case, args.parameter, grid, settings, option=args.option, executor=executor,
                                           section=section, continuation=not args.parallel, progress=progress)
        except BaseException:
            executor.abort()
            raise
        executor.close()
        write_csv(scan, tmp / "dynamics" / "scan.csv")
        write_csv(points, tmp / "dynamics" / "scan_points.csv")
        write_csv(trans, tmp / "dynamics" / "transitions.csv")
        seconds = time.monotonic() - t0
        write_json(settings_record(settings, parameter=args.parameter, values=grid.tolist(), option=args.option,
                                   execution=executor.describe(),
                                   section=f"maxima of {section}", continuation=not args.parallel, others="every other parameter at its prior median",
                                   declared=declared,
                                   seconds=round(seconds, 2), failed=int(points.failed.sum())),
                   tmp / "dynamics" / "dynamics.json")
        write_json({"tool": "impact", "version": __version__, "command": sys.argv, "stages": ["scan"],
                    "case": {"path": str(Path(case.path).resolve()), "sha256": case.sha256, "title": case.title}},
                   tmp / "manifest.json")
    for _, r in points.iterrows():
        print(f"{args.parameter} = {r.value:.6g}: {r.regime}" + (f" (period {r.period})" if r.regime == "cycle" else "")
              + (f" ({r.reason})" if r.regime == "undetermined" else "") + f", λ = {r.lyapunov:.3g} ± {r.lyapunov_se:.2g}")
    for _, r in trans.iterrows():
        print(f"transition {r.kind}: {r.from_regime} -> {r.to_regime} between {r.from_value:.6g} and {r.to_value:.6g}")
    if points.failed.any():
        print(f"WARNING: {int(points.failed.sum())} scan values failed numerically")
    print(f"results written to {folder.path} ({len(grid) / max(seconds, 1e-9):.2f} values per second)")
    _say_replaced(folder)
    return 0


def _screen_settings(case: Case, args, seed: int):
    """The prior screen's settings from the command line."""
    from .sensitivity import Settings

    screen = {"auto": None, "morris": True, "none": False}[args.screen]
    return Settings(base_samples=args.base_samples, second_order=args.second_order, seed=seed,
                    confidence=case.risk.confidence, tolerance=args.tolerance, failure_limit=args.failure_limit,
                    screen=screen)


def cmd_sensitivity(args) -> int:
    from .execute import make_executor
    from .outfolder import OutputFolder
    from .results import write_csv, write_json
    from .sensitivity import check_settings

    case = load_case(args.case)
    seed = args.seed if args.seed is not None else case.seed
    if seed < 0:
        raise CaseError("command line", "--seed", "must be a non-negative whole number")
    folder = OutputFolder(args.out, replace=args.replace_results)
    progress = _Progress(args.quiet)
    executor = make_executor(args.workers, args.cluster)
    try:
        settings = _screen_settings(case, args, seed)
        check_settings(settings)
        with folder, folder.stage() as tmp:
            tables, records, entry = prior_screen(case, settings, progress, executor)
            for rel, frame in tables.items():
                write_csv(frame, tmp / rel)
            for rel, rec in records.items():
                write_json(rec, tmp / rel)
            print(f"prior screen: {entry['runs']} runs, N = {entry['N']}; {entry['not_converged']} outputs not converged; "
                  f"indices conditional on: {entry['conditional_on']}")
            write_json({"tool": "impact", "version": __version__, "command": sys.argv, "stages": ["sensitivity"],
                        "seed": seed, "sensitivity": entry, "packages": package_versions(),
                        "execution": executor.describe(),
                        "case": {"path": str(Path(case.path).resolve()), "sha256": case.sha256, "title": case.title,
                                 "invented": case.invented}},
                       tmp / "manifest.json")
    except BaseException:
        executor.abort()
        raise
    executor.close()
    print(f"results written to {folder.path}")
    _say_replaced(folder)
    return 0


def _executor_flags(p):
    g = p.add_mutually_exclusive_group()
    g.add_argument("--workers", type=int, default=None,
                   help="worker processes on this machine (default: its cores; 1 computes in this process)")
    g.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="a running dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="impact", description="Paired-ensemble risk assessment of interventions in food webs.")
    ap.add_argument("--version", action="version", version=f"impact {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate a case file and print what was understood")
    p.add_argument("case")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("assess", help="run the full assessment of a case")
    p.add_argument("case")
    p.add_argument("--out", required=True, help="results folder; an existing one is refused unless --replace-results")
    p.add_argument(REPLACE_FLAG, action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--members", type=int, default=None, help="plausible members wanted (default: the case's)")
    p.add_argument("--seed", type=int, default=None, help="random seed (default: the case's)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.add_argument("--no-report", action="store_true", help="do not write report.pdf")
    p.add_argument("--paper", choices=("a4", "letter"), default="a4", help="paper size of report.pdf (default a4)")
    p.add_argument("--no-dynamics", action="store_true", help="skip the regime / Lyapunov diagnostics")
    p.add_argument("--no-sensitivity", action="store_true", help="skip the Sobol sensitivity stage")
    p.add_argument("--base-samples", type=int, default=128,
                   help="Sobol base samples N for the sensitivity stage, a power of two (default 128, kept small for speed)")
    _executor_flags(p)
    p.add_argument("--resume", action="store_true",
                   help="reuse the chunks an interrupted run of the same case, seed and members saved")
    p.add_argument("--chunk-members", type=int, default=None,
                   help="members per chunk of work and checkpoint (default: an even share per worker, 100-2000)")
    p.set_defaults(func=cmd_assess)

    p = sub.add_parser("sensitivity", help="Sobol global sensitivity of every risk metric to the uncertain parameters")
    p.add_argument("case")
    p.add_argument("--out", required=True, help="results folder; an existing one is refused unless --replace-results")
    p.add_argument(REPLACE_FLAG, action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--base-samples", type=int, default=1024, help="Sobol base samples N, a power of two (default 1024)")
    p.add_argument("--second-order", action="store_true", help="also estimate second-order (pairwise) indices")
    p.add_argument("--seed", type=int, default=None, help="seed of the design scramble and bootstrap (default: the case's)")
    p.add_argument("--screen", choices=("auto", "morris", "none"), default="auto",
                   help="Morris screening before Sobol: auto = only with more than 20 uncertain parameters")
    p.add_argument("--tolerance", type=float, default=0.2,
                   help="widest acceptable full CI width and N/2-to-N shift of an index (default 0.2)")
    p.add_argument("--failure-limit", type=float, default=0.05, help="largest share of failed design points (default 0.05)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    _executor_flags(p)
    p.set_defaults(func=cmd_sensitivity)

    p = sub.add_parser("scan", help="bifurcation scan of one parameter or intervention intensity")
    p.add_argument("case")
    p.add_argument("--parameter", required=True, help="a declared parameter, or INTERVENTION.rate|fraction|factor")
    p.add_argument("--from", dest="start", type=float, required=True)
    p.add_argument("--to", dest="stop", type=float, required=True)
    p.add_argument("--steps", type=int, required=True, help="number of values (at least 2)")
    p.add_argument("--option", default=None, help="run under this option's press interventions")
    p.add_argument("--out", required=True, help="results folder; an existing one is refused unless --replace-results")
    p.add_argument(REPLACE_FLAG, action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--transient", type=float, default=None, help="time discarded at each value")
    p.add_argument("--window", type=float, default=None, help="time diagnosed at each value")
    p.add_argument("--sample-dt", type=float, default=None, help="sampling / renormalisation interval")
    p.add_argument("--max-period", type=int, default=None, help="longest period looked for (default 8)")
    p.add_argument("--period-tol", type=float, default=None,
                   help="section values are equal within this fraction of the oscillation's amplitude (default 1e-3)")
    p.add_argument("--section", default=None, metavar="SPECIES",
                   help="species whose successive maxima form the Poincaré section (default: the last declared species)")
    p.add_argument("--parallel", action="store_true", help="run all values side by side from the initial state instead of continuing")
    _executor_flags(p)
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_scan)

    p = sub.add_parser("report", help="rebuild the PDF report from a saved results directory (no re-simulation)")
    p.add_argument("results", help="results directory written by `impact assess`")
    p.add_argument("--out", default=None, help="PDF file (default: RESULTS/report.pdf)")
    p.add_argument("--paper", choices=("a4", "letter"), default="a4", help="paper size (default a4)")
    p.set_defaults(func=cmd_report)
    return ap


class Terminated(KeyboardInterrupt):
    """SIGTERM (batch schedulers, ``timeout``): unwound like Ctrl-C, so nothing is left half-done."""


def _on_sigterm(signum, frame):
    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # a second SIGTERM must not cut the clean-up short
    raise Terminated()


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm), signal.getsignal(signal.SIGINT)
    except ValueError:  # not the main thread: leave signals alone
        previous = None
    try:
        return args.func(args)
    except CaseError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except WriteError as exc:
        print(f"error: {exc.path}: {exc.message}", file=sys.stderr)
        return 2
    except OSError as exc:
        # not raised as a ReadError or WriteError: say what the system said, and where
        print(f"error: {exc.filename or getattr(args, 'out', None) or 'impact'}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except WorkerLost as exc:
        print(f"error: {exc}; the chunks already finished are saved: rerun with --resume", file=sys.stderr)
        return 1
    except KeyboardInterrupt as exc:
        what = "terminated" if isinstance(exc, Terminated) else "interrupted"
        resume = "; the chunks already finished are kept: run the same command with --resume to continue" \
            if args.command == "assess" else ""
        print(f"{what}; no results were written{resume}", file=sys.stderr)
        return 143 if isinstance(exc, Terminated) else 130
    finally:
        if previous is not None:  # (the final move of results ignores both: see impact.outfolder)
            signal.signal(signal.SIGTERM, previous[0])
            signal.signal(signal.SIGINT, previous[1])


if __name__ == "__main__":
    sys.exit(main())
