"""Command-line interface: the only module that parses arguments or prints."""

from __future__ import annotations

import argparse
import platform
import sys
import time
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .case import Case, load_case
from .errors import CaseError
from .execute import WorkerLost

CAUTION = ("Model-based screening aid: results depend on the model structure and priors shown. "
           "Decisions rest with licensed ecological review and the applicable local regulations and permits.")


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


def package_versions() -> dict[str, str]:
    out = {"python": platform.python_version(), "impact": __version__}
    for name in ("numpy", "scipy", "pandas", "SALib", "jinja2", "weasyprint", "matplotlib"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def priors_table(case: Case) -> pd.DataFrame:
    rows = []
    for p in case.parameters:
        args = {k: getattr(p.prior, k) for k in p.prior.__dataclass_fields__}
        rows.append(dict(name=p.name, distribution=p.prior.kind, arguments=p.prior.describe(),
                         unit=p.unit, source=p.source, description=p.description,
                         uncertain=p.uncertain, **{f"arg_{k}": v for k, v in args.items()}))
    return pd.DataFrame(rows)


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
        bits.append(f"initial={s.initial}")
        if not s.present:
            bits.append("absent today")
        if s.noise_sd != 0.0:
            bits.append(f"noise sd={s.noise_sd}")
        bits.append(f"quasi-extinction<{s.quasi_extinction:g}")
        if s.outbreak is not None:
            bits.append(f"outbreak>{s.outbreak:g}")
        L.append(f"  {s.name} [{s.unit}]: " + ", ".join(str(b) for b in bits))
    L.append(f"interactions ({len(case.feeding) + len(case.competition) + len(case.mutualism)}):")
    for f in case.feeding:
        L.append(f"  {f.kind}: {f.consumer} eats {f.resource} ({f.response}; a={f.attack_rate}, h={f.handling_time}, e={f.efficiency})")
    for c in case.competition:
        L.append(f"  competition: {c.competitor} crowds {c.species} (alpha={c.coefficient})")
    for u in case.mutualism:
        L.append(f"  mutualism: {u.partner} benefits {u.beneficiary} (max={u.max_benefit}, half-saturation={u.half_saturation})")
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
        L.append(f"  {iv.name}: {iv.kind} of {iv.species} {when} {case.time_unit}")
    L.append("options: " + "; ".join(f"{o.name} = {' + '.join(o.interventions)}" for o in case.options))
    L.append(f"risk horizons: {', '.join(f'{h:g}' for h in case.risk.horizons)} {case.time_unit}; "
             f"recovery to {case.risk.recovery_fraction:.0%} of baseline; {case.risk.confidence:.0%} intervals")
    return "\n".join(L)


def _fmt_p(v, lo, hi):
    return f"{v:5.1%} [{lo:.1%}, {hi:.1%}]"


def summary_text(case: Case, risk: pd.DataFrame, counts: dict, failures: dict) -> str:
    H = case.horizon
    L = [f"{case.title}",
         f"draws: {counts['tried']} tried, {counts['kept']} plausible kept "
         f"({counts['failed']} failed numerically, {counts['extinct']} lost a species, {counts['out_of_range']} outside observed ranges)"]
    if counts["kept"] < counts["wanted"]:
        L.append(f"WARNING: only {counts['kept']} of {counts['wanted']} wanted members were plausible within the draw limit")
    for opt, f in failures.items():
        if f["failed"]:
            L.append(f"WARNING: {f['failed']} members failed numerically under {opt}: "
                     + ", ".join(f"{k} {v}" for k, v in f.items() if k != "failed"))
    L.append(f"quasi-extinction probability by {H:g} {case.time_unit} [{case.risk.confidence:.0%} CI], and median change in mean abundance vs baseline:")
    names = ["baseline", *[o.name for o in case.options]]
    width = max(len(s) for s in case.species_names)
    for sp in case.species_names:
        cells = []
        for opt in names:
            r = risk[(risk.option == opt) & (risk.species == sp) & (risk.horizon == H)]
            q = r[r.metric == "quasi_extinction"]
            d = r[r.metric == "mean_change"]
            cell = _fmt_p(*q[["value", "low", "high"]].iloc[0]) if len(q) else "   n/a"
            if len(d):
                cell += f" {d['value'].iloc[0]:+.0%}"
            cells.append(f"{opt}: {cell}")
        L.append(f"  {sp:<{width}}  " + " | ".join(cells))
    L.append("CAUTION: " + CAUTION)
    return "\n".join(L)


def cmd_check(args) -> int:
    case = load_case(args.case)
    print(describe_case(case))
    print("case file is valid.")
    return 0


def cmd_assess(args) -> int:
    from .assess import draw_block_size, run_chunk_size
    from .execute import make_executor
    from .results import Checkpoints

    case = load_case(args.case)
    members = args.members if args.members is not None else case.members
    seed = args.seed if args.seed is not None else case.seed
    if members < 1:
        raise CaseError("command line", "--members", "must be at least 1")
    if args.chunk_members is not None and args.chunk_members < 1:
        raise CaseError("command line", "--chunk-members", f"must be at least 1, got {args.chunk_members}")
    if seed < 0:
        raise CaseError("command line", "--seed", "must be a non-negative whole number")
    if not getattr(args, "no_sensitivity", False):
        from .sensitivity import Settings, check_settings

        check_settings(Settings(base_samples=args.base_samples, seed=seed))  # fail before any simulation
    progress = _Progress(args.quiet)
    started = datetime.now(timezone.utc)
    t0 = time.monotonic()
    executor = make_executor(args.workers, args.cluster)
    try:
        # a resumed run keeps the chunking of the run it continues (results never depend on it)
        earlier = Checkpoints.previous(Path(args.out)) if args.resume else None
        chunk = ((earlier or {}).get("run_chunk") or args.chunk_members
                 or run_chunk_size(members, executor.workers, runs=1 + len(case.options)))
        block = (earlier or {}).get("draw_block") or draw_block_size(members, executor.workers)
        fingerprint = {"version": __version__, "case_sha256": case.sha256, "seed": seed, "members": members,
                       "max_draws": case.max_draws, "draw_block": block, "run_chunk": chunk,
                       "sensitivity": None if args.no_sensitivity else {"base_samples": args.base_samples}}
        store = Checkpoints(Path(args.out), fingerprint, resume=args.resume)
        if args.resume and any(store.dir.glob("*.npz")):
            progress(f"resuming from {len(list(store.dir.glob('*.npz')))} saved chunks in {store.dir}", force=True)
        text = _assess_into(case, args, members, seed, block, chunk, executor, store, progress, started, t0)
    finally:
        executor.close()
    store.discard()
    print(text)
    print(f"results written to {args.out}")
    return 0


def _assess_into(case: Case, args, members: int, seed: int, block: int, chunk: int, executor, store, progress,
                 started, t0) -> str:
    from .assess import assess_members, bands_table, draw_ensemble, failure_counts, members_table, risk_table
    from .model import equations
    from .results import staged_directory, write_csv, write_json

    with staged_directory(Path(args.out)) as tmp:
        ens = draw_ensemble(case, members, seed, progress=progress, executor=executor, store=store, block=block)
        runs = assess_members(case, ens, seed, progress=progress, executor=executor, store=store, chunk=chunk)
        progress("tabulating risk", force=True)
        risk = risk_table(case, runs)
        failures = failure_counts(runs)
        write_csv(risk, tmp / "risk.csv")
        write_csv(bands_table(case, runs), tmp / "bands.csv")
        write_csv(members_table(case, ens, runs), tmp / "members.csv")
        params = pd.DataFrame({"member": ens.draws, **{p.name: ens.values[p.name] for p in case.uncertain}})
        write_csv(params, tmp / "parameters.csv")
        write_csv(priors_table(case), tmp / "priors.csv")
        manifest = {
            "tool": "impact", "version": __version__,
            "case": {"path": str(Path(case.path).resolve()), "sha256": case.sha256, "title": case.title,
                     "analyst": case.analyst, "description": case.description, "invented": case.invented},
            "command": sys.argv,
            "started_utc": started.isoformat(timespec="seconds"),
            "seconds": round(time.monotonic() - t0, 2),
            "seed": seed,
            "counts": {**ens.counts, "failed_by_option": failures},
            "time_unit": case.time_unit, "horizon": case.horizon, "horizons": list(case.risk.horizons),
            "confidence": case.risk.confidence, "recovery_fraction": case.risk.recovery_fraction,
            "species": [dict(name=s.name, unit=s.unit, quasi_extinction=s.quasi_extinction, outbreak=s.outbreak,
                             generation_time=s.generation_time, present=s.present, growth=s.growth) for s in case.species],
            "options": [dict(name=o.name, interventions=list(o.interventions), description=o.description) for o in case.options],
            "interventions": [dict(name=iv.name, kind=iv.kind, species=iv.species, start=iv.start, end=iv.end,
                                   description=iv.description) for iv in case.interventions],
            # who acts on whom, for the report's food-web diagram (drawn from saved results alone)
            "interactions": ([dict(kind=f.kind, **{"from": f.consumer, "to": f.resource}, response=f.response)
                              for f in case.feeding]
                             + [dict(kind="competition", **{"from": c.competitor, "to": c.species}, response=None)
                                for c in case.competition]
                             + [dict(kind="mutualism", **{"from": u.partner, "to": u.beneficiary}, response=None)
                                for u in case.mutualism]),
            "equations": equations(case),
            "assumptions": list(case.notes),
            "plausibility": "kept draws whose deterministic spin-up keeps every species present today above its "
                            "quasi-extinction level over the second half of spin-up and whose state today lies in "
                            "every observed range",
            "packages": package_versions(),
            "platform": platform.platform(),
            "stages": ["assess"],
            "caution": CAUTION,
        }
        # Later stages read the core tables from `tmp` and write into their own sub-directories;
        # each appends its name to manifest["stages"] and may add a manifest entry of its own.
        # stage: sensitivity
        if not getattr(args, "no_sensitivity", False) and len(case.uncertain) < 2:
            manifest["sensitivity"] = {"skipped": f"{len(case.uncertain)} uncertain parameter(s); Sobol indices need at least two"}
        elif not getattr(args, "no_sensitivity", False):
            manifest["sensitivity"] = _sensitivity_into(case, args, seed, tmp, progress, executor, store)
            manifest["stages"].append("sensitivity")
        # stage: dynamics
        if not getattr(args, "no_dynamics", False):
            from .screen import assess_stage

            dyn, dyn_record = assess_stage(case, ens.params, ens.values, runs, progress=progress,
                                           executor=executor, seed=seed)
            for key, frame in dyn.items():
                write_csv(frame, tmp / "dynamics" / f"{key}.csv")
            write_json(dyn_record, tmp / "dynamics" / "dynamics.json")
            manifest["stages"].append("dynamics")
        # every stage's chunks are in by now
        manifest["execution"] = {**executor.describe(), "chunks_reused": store.reused, "chunks_computed": store.saved}
        write_json(manifest, tmp / "manifest.json")
        # stage: report (needs the manifest on disk)
        if not getattr(args, "no_report", False):
            from .report import write_report

            progress("writing report.pdf", force=True)
            write_report(tmp, tmp / "report.pdf", paper=getattr(args, "paper", "a4"))
        text = summary_text(case, risk, ens.counts, failures)
        (tmp / "summary.txt").write_text(text + "\n", encoding="utf-8")
    return text


def cmd_report(args) -> int:
    from .report import write_report

    out = write_report(args.results, args.out, paper=args.paper)
    print(f"report written to {out}")
    return 0


def cmd_scan(args) -> int:
    from .dynamics import declared_settings, section_species, settings_record
    from .scan import scan_web
    from .execute import make_executor
    from .results import staged_directory, write_csv, write_json

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
    progress = _Progress(args.quiet)
    t0 = time.monotonic()
    executor = make_executor(args.workers, args.cluster)
    with staged_directory(Path(args.out)) as tmp:
        try:
            scan, points, trans = scan_web(case, args.parameter, grid, settings, option=args.option, executor=executor,
                                           section=section, continuation=not args.parallel, progress=progress)
        finally:
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
    print(f"results written to {args.out} ({len(grid) / max(seconds, 1e-9):.2f} values per second)")
    return 0


def _sensitivity_into(case: Case, args, seed: int, out: Path, progress, executor=None, store=None) -> dict:
    """Run the sensitivity stage and write its tables into ``out / "sensitivity"``; print its summary."""
    from .results import write_csv, write_json
    from .sensitivity import DEFAULT_FAILURE_LIMIT, DEFAULT_TOLERANCE, Settings, sensitivity_stage, summary_lines

    screen = {"auto": None, "morris": True, "none": False}[getattr(args, "screen", "auto")]
    settings = Settings(base_samples=args.base_samples, second_order=getattr(args, "second_order", False), seed=seed,
                        confidence=case.risk.confidence, tolerance=getattr(args, "tolerance", DEFAULT_TOLERANCE),
                        failure_limit=getattr(args, "failure_limit", DEFAULT_FAILURE_LIMIT), screen=screen)
    t0 = time.monotonic()
    res = sensitivity_stage(case, settings, progress=progress, executor=executor, store=store)
    d = out / "sensitivity"
    write_csv(res.indices, d / "indices.csv")
    write_csv(res.second_order, d / "second_order.csv")
    write_csv(res.ranking, d / "ranking.csv")
    write_csv(res.convergence, d / "convergence.csv")
    info = {**res.info, "seconds_total": round(time.monotonic() - t0, 2)}
    write_json(info, d / "sensitivity.json")
    for line in summary_lines(res):
        print(line)
    return {"N": info["N"], "runs": info["runs"], "not_converged": info["not_converged"],
            "refused": len(info["refused"]), "conditional_on": info["conditional_on"]}


def cmd_sensitivity(args) -> int:
    from .execute import make_executor
    from .results import staged_directory, write_json

    case = load_case(args.case)
    seed = args.seed if args.seed is not None else case.seed
    if seed < 0:
        raise CaseError("command line", "--seed", "must be a non-negative whole number")
    progress = _Progress(args.quiet)
    executor = make_executor(args.workers, args.cluster)
    try:
        with staged_directory(Path(args.out)) as tmp:
            entry = _sensitivity_into(case, args, seed, tmp, progress, executor)
            write_json({"tool": "impact", "version": __version__, "command": sys.argv, "stages": ["sensitivity"],
                        "seed": seed, "sensitivity": entry, "packages": package_versions(),
                        "execution": executor.describe(),
                        "case": {"path": str(Path(case.path).resolve()), "sha256": case.sha256, "title": case.title,
                                 "invented": case.invented}},
                       tmp / "manifest.json")
    finally:
        executor.close()
    print(f"results written to {args.out}")
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
    p.add_argument("--out", required=True, help="results directory (created or replaced)")
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
    p.add_argument("--out", required=True, help="results directory (created or replaced)")
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
    p.add_argument("--out", required=True, help="results directory (created or replaced)")
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


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except CaseError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        # an unwritable or full output location; checkpoints already saved stay valid
        where = exc.filename or getattr(args, "out", None) or "output"
        print(f"error: {where}: cannot write ({exc.strerror or exc}); choose another --out or free space "
              "(an interrupted assessment can continue with --resume)", file=sys.stderr)
        return 2
    except WorkerLost as exc:
        print(f"error: {exc}; the chunks already finished are saved: rerun with --resume", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("interrupted; no results were written", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
