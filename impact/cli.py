"""Command-line interface: the only module that parses arguments or prints."""

from __future__ import annotations

import argparse
import signal
import sys
import time


from impact.version import __version__
from impact.api import AssessSettings
from impact.case import Case, load_case, schedule_text
from impact.risk.effects import event_text
from impact.errors import CaseError, InstallationError, SettingError, WriteError, spell
from impact.run.execute import WorkerLost
from impact.run.interrupts import ignore_from_now_on
from impact.pipeline import Execution

# API parameter -> flag: errors name the library's parameter, the command line shows its flag
FLAGS = {name: "--" + name.replace("_", "-") for name in (
    "members", "seed", "workers", "processes", "cluster", "chunk_members", "out", "replace_results", "resume", "paper",
    "base_samples", "parameter", "option", "section", "steps", "transient", "window", "sample_dt", "max_period",
    "period_tol", "tolerance", "failure_limit", "ensemble", "accept_edits")}
FLAGS.update(start="--from", stop="--to")

# exit status of `impact assess` when the results are written but too thin for a verdict
# (fewer plausible members than risk.min_members); 2 stays reserved for bad input
EXIT_NO_VERDICT = 3

class _Progress:
    """Progress lines on stderr: stage messages, and counts with rate and time left.

    Silent with ``--quiet`` or when stderr is not a terminal (logs and pipes stay clean).
    ``clock`` is the time source (seconds); a test gives its own instead of patching the process's.
    """

    def __init__(self, quiet: bool, stream=None, clock=time.monotonic):
        self.stream = stream or sys.stderr
        self.quiet = quiet or not getattr(self.stream, "isatty", lambda: False)()
        self.clock = clock
        self.t0 = clock()
        self.last = 0.0
        self.started: dict[str, tuple[float, int]] = {}

    def __call__(self, msg: str, force: bool = False):
        now = self.clock()
        if self.quiet or (not force and now - self.last < 0.5):
            return
        self.last = now
        print(f"[{now - self.t0:6.1f} s] {msg}", file=self.stream, flush=True)

    def count(self, label: str, done: int, total: int, unit: str):
        now = self.clock()
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
        if s.allee == "predator-dilution":
            bits.append(f"predator-dilution Allee effect (losses {s.dilution_rate}·N/(N + {s.allee_threshold}))")
        elif s.allee != "none":
            bits.append(f"{s.allee} Allee effect (threshold {s.allee_threshold})")
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
    if case.structures is not None:  # structural doubts: the union web above, the webs it stands for here
        st = case.structures
        L.append(f"structural doubts ({len(st.doubts)}; a field '... [by structure]' takes each web's value):")
        for d in st.doubts:
            L.append(f"  {d.name} (interactions[{d.interaction}]): "
                     + "; ".join(f"{c.label} {c.weight:.0%}" for c in d.choices))
        L.append(f"webs weighed ({len(st.structures)}{', named in [[webs]]' if st.declared else ''}):")
        for w in st.structures:
            L.append(f"  {w.weight:.1%}  {w.name}")
    if case.seasons is not None:
        sea = case.seasons
        L.append(f"seasons: {sea.length:g} {case.time_unit} in {sea.parts} {sea.part_name}s; today starts a season")
    if case.carrion is not None:
        L.append(f"carrion pool: decay rate {case.carrion.decay_rate}")
    if case.individuals:
        L.append(f"individuals at low numbers ({len(case.individuals)}; below the switch, births and deaths are "
                 f"random events and 'extinct' means zero individuals):")
        L += [f"  {x.describe(case.species_by_name(x.species).unit)}" for x in case.individuals]
    L.append(f"parameters ({len(case.parameters)}, {len(case.uncertain)} uncertain):")
    for p in case.parameters:
        L.append(f"  {p.name} = {p.prior.describe()} [{p.unit or 'no unit given'}]" + (f"  source: {p.source}" if p.source else "  (no source given)"))
    L.append(f"observed today ({len(case.observed)}):")
    for o in case.observed:
        L.append(f"  {o.species} in [{o.low:g}, {o.high:g}]" + (f"  source: {o.source}" if o.source else ""))
    for m in case.monitoring:
        L.append(f"  monitoring of {m.species}: {len(m.times)} {m.kind} values from {m.times[0]:g} to {m.times[-1]:g} "
                 f"{case.time_unit} ({m.error}; detection {m.detection}, scale {m.scale})"
                 + (f" from {m.file}" if m.file else "") + (f"  source: {m.source}" if m.source else ""))
    for c in case.change_limits:
        bounds = " and ".join(b for b in (f"grows at most ×{c.up:g}" if c.up else "",
                                          f"falls at most ÷{c.down:g}" if c.down else "") if b)
        L.append(f"  limit on change of {c.species}: {bounds} per {c.step:g} {case.time_unit} from {c.start:g} to {c.end:g}")
    for st in case.studies:
        L.append(f"  candidate study “{st.name}”: {st.samples} × {st.error} of {st.measures} {st.target}, "
                 f"cost {st.cost:g} {st.cost_unit}")
    if case.weighing is not None:
        L.append("  weighing: " + "; ".join([f"{o} costs {c.describe()} {case.weighing.cost_unit}" for o, c in case.weighing.option_costs]
                                            + [f"weight of “{o}” " + (f"{lo:g}" if lo == hi else f"{lo:g}–{hi:g}")
                                               for o, lo, hi in case.weighing.weights]
                                            + ([f"budget {case.weighing.budget:g} {case.weighing.cost_unit}"]
                                               if case.weighing.budget is not None else [])))
    if case.calibration is not None:
        c = case.calibration
        L.append(f"calibration: sampler {c.sampler}, rejection while at least {c.min_acceptance:.0%} of draws are kept"
                 + (f", at most {c.max_simulations} simulations" if c.max_simulations else ""))
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
    for v in case.surveillance:
        L.append(f"surveillance of {v.species}: gone below {v.gone_below:g} {case.species_by_name(v.species).unit}; "
                 f"one {v.survey} detects it with chance {v.detection}; declared at {v.confidence:.0%} confidence; "
                 f"arrivals from outside {v.arrival_rate}/{case.time_unit}, each founding with chance {v.establishment}")
    L.append(f"risk horizons: {', '.join(f'{h:g}' for h in case.risk.times)} {case.time_unit}; "
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
    from impact.risk.budget import check_fits, estimate
    from impact.run.execute import machine_cores
    from impact.pipeline import case_warnings

    case = load_case(args.case)
    print(describe_case(case))
    for line in case_warnings(case):
        print(f"warning: {line}")
    est = estimate(case, case.members, machine_cores())
    print(est.describe())
    check_fits(est, case, members_given=False)
    print("case file is valid.")
    return 0


def _execution(args) -> Execution:
    return Execution(workers=args.workers, cluster=args.cluster, chunk_members=getattr(args, "chunk_members", None),
                     processes=args.processes)


def cmd_assess(args) -> int:
    from impact.pipeline import assess_to_folder, case_warnings

    case = load_case(args.case)
    reused = None
    if args.ensemble is not None:
        from impact.api import load_ensemble

        reused = load_ensemble(args.ensemble, case)
    settings = AssessSettings(members=args.members, seed=args.seed, sensitivity=not args.no_sensitivity,
                              base_samples=args.base_samples, dynamics=not args.no_dynamics)
    for line in case_warnings(case):
        print(f"warning: {line}", file=sys.stderr)
    progress = _Progress(args.quiet)
    written = assess_to_folder(case, settings, args.out, replace=args.replace_results, resume=args.resume,
                               report=not args.no_report, paper=args.paper, execution=_execution(args),
                               progress=lambda m: progress(m, force=True), command=sys.argv, ensemble=reused)
    print(written.summary)
    print(f"results written to {written.path}")
    _say_replaced(written)
    return EXIT_NO_VERDICT if written.result.thin else 0


def _say_replaced(written) -> None:
    if written.replaced:
        print(f"--replace-results: replaced {len(written.replaced)} files impact had written in {written.path}: "
              + ", ".join(written.replaced))
    if written.replaced and written.kept:
        print(f"kept {len(written.kept)} other files there: " + ", ".join(written.kept))


def cmd_report(args) -> int:
    from impact.api import build_report

    if args.accept_edits:
        print("WARNING: --accept-edits: the report is built even from tables that differ from what impact wrote; "
              "page 1 names them", file=sys.stderr)
    out = build_report(args.results, args.out, paper=args.paper, accept_edits=args.accept_edits)
    print(f"report written to {out}")
    return 0


def cmd_verify(args) -> int:
    from impact.api import verify

    result = verify(args.results, args.pdf)
    for line in result.lines:
        print(line)
    print("verified: the folder and the PDF are what impact wrote" if result.ok
          else "NOT VERIFIED: see the differences above")
    return 0 if result.ok else 1


def cmd_scan(args) -> int:
    from impact.pipeline import ScanSettings, scan_to_folder

    case = load_case(args.case)
    scan = ScanSettings(parameter=args.parameter, start=args.start, stop=args.stop, steps=args.steps,
                        option=args.option, section=args.section, transient=args.transient, window=args.window,
                        sample_dt=args.sample_dt, max_period=args.max_period, period_tol=args.period_tol,
                        continuation=not args.parallel)
    written = scan_to_folder(case, scan, args.out, replace=args.replace_results, execution=_execution(args),
                             progress=_Progress(args.quiet), command=sys.argv)
    points, trans = written.tables["dynamics/scan_points.csv"], written.tables["dynamics/transitions.csv"]
    for _, r in points.iterrows():
        print(f"{args.parameter} = {r.value:.6g}: {r.regime}" + (f" (period {r.period})" if r.regime == "cycle" else "")
              + (f" ({r.reason})" if r.regime == "undetermined" else "") + f", λ = {r.lyapunov:.3g} ± {r.lyapunov_se:.2g}")
    for _, r in trans.iterrows():
        print(f"transition {r.kind}: {r.from_regime} -> {r.to_regime} between {r.from_value:.6g} and {r.to_value:.6g}")
    if points.failed.any():
        print(f"WARNING: {int(points.failed.sum())} scan values failed numerically")
    print(f"results written to {written.path} ({written.summary})")
    _say_replaced(written)
    return 0


def cmd_sensitivity(args) -> int:
    from impact.pipeline import screen_to_folder
    from impact.decision.sensitivity import Settings

    case = load_case(args.case)
    seed = args.seed if args.seed is not None else case.seed
    screen = {"auto": None, "morris": True, "none": False}[args.screen]
    settings = Settings(base_samples=args.base_samples, second_order=args.second_order, seed=seed,
                        confidence=case.risk.confidence, tolerance=args.tolerance, failure_limit=args.failure_limit,
                        screen=screen)
    written = screen_to_folder(case, settings, args.out, replace=args.replace_results, execution=_execution(args),
                               progress=_Progress(args.quiet), command=sys.argv)
    print(written.summary)
    print(f"results written to {written.path}")
    _say_replaced(written)
    return 0


def cmd_calibrate(args) -> int:
    from impact.pipeline import calibrate_to_folder

    case = load_case(args.case)
    written = calibrate_to_folder(case, args.out, members=args.members, seed=args.seed, replace=args.replace_results,
                                  execution=_execution(args), progress=_Progress(args.quiet), command=sys.argv)
    print(written.summary)
    print(f"ensemble written to {written.path}; assess it with: impact assess {case.path} --ensemble {written.path} "
          "--out DIR")
    return 0


def _executor_flags(p):
    g = p.add_mutually_exclusive_group()
    g.add_argument("--workers", type=int, default=None,
                   help="workers on this machine, threads of this process (default: its cores; 1 computes in this "
                        "process alone)")
    g.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="a running dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")
    p.add_argument("--processes", action="store_true",
                   help="local workers are processes, not threads (the Python between the compiled steps then "
                        "runs side by side too)")


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="impact", description="Paired-ensemble risk assessment of interventions in food webs.")
    ap.add_argument("--version", action="version", version=f"impact {__version__}")
    sub = ap.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate a case file and print what was understood")
    p.add_argument("case", help="the case file (TOML)")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("assess", help="run the full assessment of a case")
    p.add_argument("case", help="the case file (TOML)")
    p.add_argument("--out", required=True, metavar="DIR", help="results folder; an existing one is refused unless --replace-results")
    p.add_argument(FLAGS["replace_results"], action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--members", type=int, default=None, help="plausible members wanted (default: the case's case.members)")
    p.add_argument("--seed", type=int, default=None, help="seed of the one random path, 0 or more (default: the case's case.seed)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.add_argument("--no-report", action="store_true", help="do not write report.pdf")
    p.add_argument("--paper", choices=("a4", "letter"), default="a4", help="paper size of report.pdf (default a4)")
    p.add_argument("--no-dynamics", action="store_true", help="skip the regime, Lyapunov exponent and predictability diagnostics")
    p.add_argument("--no-sensitivity", action="store_true", help="skip what the decision hinges on (main effects, value of information) and the Sobol screen of the priors")
    p.add_argument("--base-samples", type=int, default=128,
                   help="Sobol base samples N of the prior screen, a power of two of at least 16 (default 128, kept small for speed)")
    _executor_flags(p)
    p.add_argument("--resume", action="store_true",
                   help="reuse the chunks an interrupted run of the same case, seed and members saved")
    p.add_argument("--chunk-members", type=int, default=None,
                   help="members per chunk of work and checkpoint (default: an even share per worker, 100-2000)")
    p.add_argument("--ensemble", default=None, metavar="DIR",
                   help="reuse the ensemble `impact calibrate` wrote in DIR instead of drawing one")
    p.set_defaults(func=cmd_assess)

    p = sub.add_parser("calibrate", help="build the (posterior) ensemble of a case alone, for assessments to reuse")
    p.add_argument("case", help="the case file (TOML)")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="ensemble folder; an existing one is refused unless --replace-results")
    p.add_argument(FLAGS["replace_results"], action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--members", type=int, default=None, help="members wanted (default: the case's case.members)")
    p.add_argument("--seed", type=int, default=None, help="seed of the one random path, 0 or more (default: the case's case.seed)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    _executor_flags(p)
    p.set_defaults(func=cmd_calibrate)

    p = sub.add_parser("sensitivity", help="Sobol global sensitivity of every risk metric over the prior box, on its own")
    p.add_argument("case", help="the case file (TOML)")
    p.add_argument("--out", required=True, metavar="DIR", help="results folder; an existing one is refused unless --replace-results")
    p.add_argument(FLAGS["replace_results"], action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--base-samples", type=int, default=1024, help="Sobol base samples N, a power of two of at least 16 (default 1024)")
    p.add_argument("--second-order", action="store_true", help="also estimate second-order (pairwise) indices")
    p.add_argument("--seed", type=int, default=None, help="seed of the design scramble and bootstrap (default: the case's)")
    p.add_argument("--screen", choices=("auto", "morris", "none"), default="auto",
                   help="Morris screening before Sobol: auto = only with more than 20 uncertain parameters (default auto)")
    p.add_argument("--tolerance", type=float, default=0.2,
                   help="widest acceptable full CI width and N/2-to-N shift of an index (default 0.2)")
    p.add_argument("--failure-limit", type=float, default=0.05, help="largest share of failed design points before an output is refused, 0 to 1 (default 0.05)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    _executor_flags(p)
    p.set_defaults(func=cmd_sensitivity)

    p = sub.add_parser("scan", help="bifurcation scan of one parameter or intervention intensity")
    p.add_argument("case", help="the case file (TOML)")
    p.add_argument("--parameter", required=True, metavar="NAME", help="a declared parameter, or INTERVENTION.rate|fraction|factor")
    p.add_argument("--from", dest="start", type=float, required=True, help="first value, in the quantity's unit")
    p.add_argument("--to", dest="stop", type=float, required=True, help="last value, greater than --from")
    p.add_argument("--steps", type=int, required=True, help="number of values (at least 2)")
    p.add_argument("--option", default=None, metavar="OPTION", help="run under this option's interventions (needed to scan an intervention intensity)")
    p.add_argument("--out", required=True, metavar="DIR", help="results folder; an existing one is refused unless --replace-results")
    p.add_argument(FLAGS["replace_results"], action="store_true",
                   help="replace the files impact wrote in an existing --out folder (other files are kept)")
    p.add_argument("--transient", type=float, default=None, help="time discarded at each value, in the case's time unit (default: from the web's time scales)")
    p.add_argument("--window", type=float, default=None, help="time diagnosed at each value, in the case's time unit (default: from the web's time scales, checked by doubling)")
    p.add_argument("--sample-dt", type=float, default=None, help="longest integration step and sampling interval, in the case's time unit (default: from the web's time scales)")
    p.add_argument("--max-period", type=int, default=None, help="longest period looked for, 1 to 64 (default 8)")
    p.add_argument("--period-tol", type=float, default=None,
                   help="section values are equal within this fraction of the oscillation's amplitude, 0 to 1 (default 0.001)")
    p.add_argument("--section", default=None, metavar="SPECIES",
                   help="species whose successive maxima form the Poincaré section (default: the last declared species)")
    p.add_argument("--parallel", action="store_true", help="run all values side by side from the initial state instead of continuing from the previous value")
    _executor_flags(p)
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_scan)

    p = sub.add_parser("report", help="rebuild the PDF report from a saved results directory (no re-simulation)")
    p.add_argument("results", help="results directory written by `impact assess`")
    p.add_argument("--out", default=None, metavar="FILE", help="PDF file (default: RESULTS/report.pdf)")
    p.add_argument("--paper", choices=("a4", "letter"), default="a4", help="paper size (default a4)")
    p.add_argument(FLAGS["accept_edits"], action="store_true",
                   help="build the report even when a table differs from the SHA-256 inventory.json records "
                        "(refused otherwise); page 1 then names the edited files")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("verify", help="check a results folder against the file hashes in its inventory.json, and a "
                                      "PDF against the folder")
    p.add_argument("results", help="results folder written by impact")
    p.add_argument("--pdf", default=None, metavar="FILE",
                   help="the PDF to check against the folder (default: RESULTS/report.pdf if there); exit status 1 "
                        "when anything differs")
    p.set_defaults(func=cmd_verify)
    return ap


def command_reference() -> str:
    """Every subcommand and option with its default, as Markdown (README's command reference)."""
    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    helps = {c.dest: c.help for c in sub._choices_actions}
    out = []
    for name, p in sub.choices.items():
        out += [f"**`impact {name}`**: {helps[name]}.", "", "| argument | meaning |", "|---|---|"]
        for a in p._actions:
            if isinstance(a, argparse._HelpAction):
                continue
            flag = " / ".join(f"`{o}`" for o in a.option_strings) or f"`{a.dest.upper()}`"
            if a.option_strings and a.nargs != 0:
                value = a.metavar or ("{" + ",".join(a.choices) + "}" if a.choices else
                                      {int: "N", float: "X"}.get(a.type, a.dest.upper()))
                flag = f"`{a.option_strings[0]} {value}`"
            need = " (required)" if a.required and a.option_strings else ""
            out.append(f"| {flag} | {(a.help or '').replace('|', '/')}{need}. |")
        out.append("")
    return "\n".join(out).rstrip() + "\n"


class Terminated(KeyboardInterrupt):
    """SIGTERM (batch schedulers, ``timeout``): unwound like Ctrl-C, so nothing is left half-done."""


def _on_sigterm(signum, frame):
    signal.signal(signal.SIGTERM, signal.SIG_IGN)  # a second SIGTERM must not cut the clean-up short
    raise Terminated()


def main(argv: list[str] | None = None, *, as_program: bool = False) -> int:
    """Run one command; the exit status.

    ``as_program``: the process ends when this returns, so once the command's outcome is decided
    a late Ctrl-C or SIGTERM is ignored rather than turning a finished run into a killed one.
    Otherwise (a caller in the same process) the signal handlers found are put back.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm), signal.getsignal(signal.SIGINT)
    except ValueError:  # not the main thread: leave signals alone
        previous = None
    try:
        return args.func(args)
    except SettingError as exc:
        print(f"error: command line: {FLAGS.get(exc.parameter, exc.parameter)}: {exc.render(FLAGS)}", file=sys.stderr)
        return 2
    except CaseError as exc:
        print(f"error: {spell(str(exc), FLAGS)}", file=sys.stderr)
        return 2
    except WriteError as exc:
        print(f"error: {exc.path}: {spell(exc.message, FLAGS)}", file=sys.stderr)
        return 2
    except InstallationError as exc:
        print(f"error: installation: {exc}", file=sys.stderr)
        return 1
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
        if previous is not None and as_program:
            ignore_from_now_on()
        elif previous is not None:  # (the final move of results ignores both: see impact.store.outfolder)
            signal.signal(signal.SIGTERM, previous[0])
            signal.signal(signal.SIGINT, previous[1])


def program() -> int:
    """The ``impact`` command."""
    return main(as_program=True)


if __name__ == "__main__":
    sys.exit(program())
