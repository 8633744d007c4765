"""All of impact's benchmarks in one run, as ratios that hold on a noisy machine.

Usage::

    python bench/run.py            # everything, including two 100,000-member runs (over an hour on 2 cores
                                   # while the demo's counted species run in Python: see 4c)
    python bench/run.py --quick    # ensemble sizes 1k and 10k only
    python bench/run.py --pace     # only: how much the second core carries in the full demo, stage by stage

Prints, each measured in this same run:

0. the engines on the demo web: member-steps per CPU second of the generated compiled kernel and
   the numpy reference; the scalar-limit estimate and the fraction of it
   reached; first-run compilation of a never-seen structure and loading from the disk cache
   (bench_engine.py);
1. the ensemble integrator against a per-member ``solve_ivp`` loop (bench_integrator.py);
2. the core stage (draws from the priors + paired option runs: the demo case without its
   monitoring data) at 1,000 and 10,000 members on 1 worker, 2 threads and 2 processes, with
   each stage's seconds from the manifests; 2b. the demo's SMC calibration on 1 worker and on 2
   threads (simulations per second);
3. the local pool against a Dask LocalCluster with 2 worker processes, same work;
4. the full demo assessment (every stage and the PDF, calibration included) with the default
   executor and in-process: wall time, each stage's seconds, peak memory of the in-process run;
   then with an empty kernel cache and again with that cache (what compiling costs a first run);
5. member throughput of the core stage at 1k, 10k and 100k members (in-process, so the
   peak memory is the whole run's): the cost should grow linearly, so members per second
   should stay flat; and the 100,000-member core stage on 2 threads;
4b. the report stage alone on the demo's saved results of 4. against a one-page document, and its
   in-process parts (bench_report.py); 4c. the core stage with the demo's species counted in
   individuals against it continuous (bench_individuals.py);
6. the test suite's duration (the README's test command; not with ``--quick``);
and, last, each target of the whole assessment beside this run's figure, met or not, and what
stood in its way when last measured.

``--pace`` (also part of the full run, after 4) runs the full demo on 1 worker and on 2 threads and prints,
per stage (the manifests' wall seconds), both times, their ratio and its share of the 2-thread run; the part
of the run outside the stages (start-up, imports, writing the tables, the PDF); the process's CPU seconds
against its wall seconds (the average number of busy cores); and the share of the CPU work the second core
carried, ``(CPU − wall) / CPU`` (a lower bound: it assumes the first core was never idle). A stage whose
ratio stays under 1.2 is named serial.

Every timing is of a separate ``impact`` process (``os.wait4`` gives its own peak resident
memory), so import costs are included the way a user meets them.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from timing import run_python

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "casework" / "island_mesopredator.toml"
CORE = ["--no-sensitivity", "--no-dynamics", "--no-report", "--quiet"]


def run_impact(args: list[str], env: dict | None = None) -> tuple[float, float]:
    """Run ``impact`` in a child process: (wall seconds, peak resident memory of that process in MiB)."""
    wall, _, peak = run_python(["-m", "impact.cli", *args], env)
    return wall, peak


TABLES = ("risk.csv", "bands.csv", "members.csv", "parameters.csv")


def same_tables(a: Path, b: Path) -> str:
    return "yes" if all((a / f).read_bytes() == (b / f).read_bytes() for f in TABLES) else "NO"


def prior_only(case: Path, work: Path) -> Path:
    """A copy of ``case`` without its monitoring data, limits on change and calibration settings:
    the core stage as drawn from the priors (draws screened for plausibility, then paired runs)."""
    dropped = ("[[monitoring]]", "[[change_limits]]", "[calibration]")
    kept, skip = [], False
    for line in case.read_text().splitlines():
        if line.startswith("["):
            skip = line.strip() in dropped
        if not skip:
            kept.append(line)
    out = work / ("prior_" + case.name)
    out.write_text("\n".join(kept) + "\n")
    return out


def stage_seconds(results: Path) -> str:
    """The wall seconds of each stage, from a results folder's manifest."""
    st = json.loads((results / "manifest.json").read_text())["execution"].get("stage_seconds", {})
    return ", ".join(f"{k} {v:.1f}" for k, v in st.items())


def section(title: str):
    print(f"\n== {title}")


SERIAL_RATIO = 1.2  # a stage 2 threads speed up less than this is named serial (common practice, no source)


def machine_ceiling(repeats: int = 3) -> float:
    """What two threads of compiled code gain over one on this machine now: a loop of arithmetic
    with nothing shared, run once on one thread and halved on two (best of ``repeats``). A virtual
    machine's two cores may share a physical core or a busy host: no stage can do better."""
    import threading

    import numba

    @numba.njit(nogil=True, cache=False)
    def spin(n):
        s = 0.0
        for i in range(n):
            s += (i % 7) * 0.5
        return s

    spin(10)
    n = 200_000_000
    one = two = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        spin(2 * n)
        one = min(one, time.perf_counter() - t)
        threads = [threading.Thread(target=spin, args=(n,)) for _ in range(2)]
        t = time.perf_counter()
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        two = min(two, time.perf_counter() - t)
    return one / two


def pace(case: str, work: Path) -> float:
    """How much the second core carries in the full demo: each stage on 1 worker and on 2 threads.
    Returns this machine's two-thread ceiling for compiled code (:func:`machine_ceiling`)."""
    res = {}
    print(f"load average before: {', '.join(f'{x:.1f}' for x in os.getloadavg())} on {os.cpu_count()} cores "
          "(above the core count, other processes share the cores and the ratios below understate threads)")
    ceiling = machine_ceiling()
    print(f"this machine's own ceiling: compiled arithmetic on 2 threads runs {ceiling:.2f}x one thread "
          "(2.00 on two free cores)")
    for w in ("1", "2"):
        out = work / f"pace{w}"
        wall, cpu, _ = run_python(["-m", "impact.cli", "assess", case, "--out", str(out), "--quiet", "--workers", w])
        man = json.loads((out / "manifest.json").read_text())
        res[w] = dict(wall=wall, cpu=cpu, stages=man["execution"].get("stage_seconds", {}))
    one, two = res["1"], res["2"]
    print(f"{'stage':<30}{'1 worker s':>11}{'2 threads s':>12}{'ratio':>7}{'share of 2-thread wall':>24}")
    rows = [(k, one["stages"].get(k, 0.0), v) for k, v in two["stages"].items()]
    # what the run's clock does not hold: start-up and imports before it, writing tables and the PDF after it
    rows.append(("outside the stages (start-up, imports, writing, PDF)", one["wall"] - sum(one["stages"].values()),
                 two["wall"] - sum(two["stages"].values())))
    serial = []
    for name, a, b in rows:
        ratio = a / b if b > 0 else float("nan")
        if ratio < SERIAL_RATIO:
            serial.append(f"{name} ({b:.1f} s)")
        print(f"{name[:30]:<30}{a:11.2f}{b:12.2f}{ratio:7.2f}{b / two['wall']:24.1%}")
    print(f"{'whole process':<30}{one['wall']:11.2f}{two['wall']:12.2f}{one['wall'] / two['wall']:7.2f}")
    for w, r in res.items():
        print(f"{w} worker(s): CPU {r['cpu']:.2f} s over {r['wall']:.2f} s wall = {r['cpu'] / r['wall']:.2f} busy cores "
              f"on average")
    print(f"share of the 2-thread run's CPU work carried by the second core (lower bound, (CPU - wall) / CPU): "
          f"{max(two['cpu'] - two['wall'], 0.0) / two['cpu']:.1%} (half would be 50 %)")
    print(f"serial (2 threads speed it up less than {SERIAL_RATIO}x): " + ("; ".join(serial) or "none"))
    print(f"load average after: {', '.join(f'{x:.1f}' for x in os.getloadavg())}")
    return ceiling


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="skip the 100,000-member run")
    ap.add_argument("--case", default=str(DEMO))
    ap.add_argument("--pace", action="store_true", help="only the second core's share of the full demo, by stage")
    args = ap.parse_args(argv)
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, {platform.platform()}")
    work = Path(tempfile.mkdtemp(prefix="impact-bench-"))
    if args.pace:
        section("pace: what the second core carries in the full demo (1 worker against 2 threads)")
        pace(args.case, work)
        return 0

    sys.path.insert(0, str(ROOT / "bench"))
    section("0. engines on the demo web (per core), scalar limit, compilation")
    import bench_engine

    engine_rates = bench_engine.measure(args.case, 2000)

    section("1. ensemble integrator vs per-member solve_ivp loop")
    import bench_integrator

    bench_integrator.main([])

    prior = prior_only(Path(args.case), work)
    section("2. core stage (draws from the prior + paired option runs; the demo without its monitoring data), "
            "1 worker vs 2 threads vs 2 processes")
    for n in (1000, 10000):
        t1, _ = run_impact(["assess", str(prior), "--out", str(work / f"c1-{n}"), "--workers", "1", "--members", str(n), *CORE])
        tt, _ = run_impact(["assess", str(prior), "--out", str(work / f"ct-{n}"), "--workers", "2", "--members", str(n), *CORE])
        tp, _ = run_impact(["assess", str(prior), "--out", str(work / f"cp-{n}"), "--workers", "2", "--processes",
                            "--members", str(n), *CORE])
        same = "yes" if same_tables(work / f"c1-{n}", work / f"ct-{n}") == same_tables(work / f"c1-{n}", work / f"cp-{n}") == "yes" else "NO"
        print(f"{n:>6} members: 1 worker {t1:6.2f} s | 2 threads {tt:6.2f} s ({t1 / tt:4.2f}x) | "
              f"2 processes {tp:6.2f} s ({t1 / tp:4.2f}x) | identical tables {same}  (ideal 2x on 2 cores)")
    t2 = tp
    print("the same work by stage, from the 10,000-member runs' manifests (wall seconds):")
    for tag in ("c1", "ct", "cp"):
        print(f"  {tag}: {stage_seconds(work / f'{tag}-10000')}")

    section("2b. calibration of the demo (SMC, 1,000 members): simulations per second, 1 worker vs 2 threads")
    rates = {}
    for w in ("1", "2"):
        t, _ = run_impact(["calibrate", args.case, "--out", str(work / f"cal{w}"), "--workers", w, "--quiet"])
        cal = json.loads((work / f"cal{w}" / "manifest.json").read_text())["calibration"]
        rates[w] = float(cal["simulations_per_second"])
        print(f"{w} worker(s): {t:6.2f} s wall, {cal['simulations']:,} simulations, "
              f"{cal['simulations_per_second']:,.0f} per second in the sampler")

    section("3. local 2-worker pool vs Dask LocalCluster (2 worker processes), same work")
    try:
        from distributed import LocalCluster
    except ImportError:
        print("dask.distributed not installed: skipped (pip install 'impact[cluster]')")
    else:
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address=None, silence_logs=40) as cluster:
            td, _ = run_impact(["assess", str(prior), "--out", str(work / "dask"), "--cluster",
                                cluster.scheduler_address, "--members", "10000", *CORE])
        print(f"2-worker pool                {t2:7.2f} s")
        print(f"Dask LocalCluster            {td:7.2f} s")
        print(f"Dask / pool                  {td / t2:7.2f}x")
        print(f"identical tables             {same_tables(work / 'c1-10000', work / 'dask')}")

    section("4. full demo assessment (all stages + PDF)")
    tf, _ = run_impact(["assess", args.case, "--out", str(work / "full"), "--quiet"])
    tf1, mem1 = run_impact(["assess", args.case, "--out", str(work / "full1"), "--quiet", "--workers", "1"])
    tpoll, _ = run_impact(["assess", str(ROOT / "casework" / "moth_pollinator.toml"), "--out", str(work / "pollinator"),
                           "--quiet"])
    print(f"default executor ({os.cpu_count()} threads)    {tf:7.2f} s  stages: {stage_seconds(work / 'full')}")
    print(f"pollinator case, same        {tpoll:7.2f} s  ({tpoll / tf:.2f}x the demo)  stages: "
          f"{stage_seconds(work / 'pollinator')}")
    print(f"in-process                   {tf1:7.2f} s  stages: {stage_seconds(work / 'full1')}, peak memory {mem1:.0f} MiB")
    # a never-seen structure: an empty kernel cache, so the state kernel and the tangent flow compile
    # (the flow in its helper process while the run goes on)
    cold = {**os.environ, "IMPACT_KERNEL_CACHE": str(work / "cold-kernels")}
    tc, _ = run_impact(["assess", args.case, "--out", str(work / "cold"), "--quiet"], env=cold)
    tw, _ = run_impact(["assess", args.case, "--out", str(work / "warm"), "--quiet"], env=cold)
    print(f"empty kernel cache           {tc:7.2f} s  stages: {stage_seconds(work / 'cold')}")
    print(f"the same cache, second run   {tw:7.2f} s  (compilation added {tc - tw:.1f} s to the first run)")

    section("4a. pace: what the second core carries in the full demo (1 worker against 2 threads)")
    ceiling = pace(args.case, work)

    section("4b. the report stage alone, on the results of 4 (bench_report.py)")
    import bench_report

    report_cpu = bench_report.measure(work / "full1", 3)

    section("4c. individuals at low numbers: the core stage with the demo's counted species against it continuous "
            "(bench_individuals.py)")
    import bench_individuals

    bench_individuals.main(["--members", "200"])

    section("5. core-stage throughput vs ensemble size (prior draws; in-process; cost should grow linearly)")
    sizes = [1000, 10000] if args.quick else [1000, 10000, 100000]
    base_rate = None
    for n in sizes:
        t, mem = run_impact(["assess", str(prior), "--out", str(work / f"n{n}"), "--members", str(n),
                             "--workers", "1", *CORE])
        rate = n / t
        base_rate = base_rate or rate
        print(f"{n:>7} members  {t:8.1f} s  {rate:7.1f} members/s  ({rate / base_rate:4.2f} of the 1k rate)  "
              f"peak memory {mem:6.0f} MiB")
    if not args.quick:
        t, _ = run_impact(["assess", str(prior), "--out", str(work / "n100000t"), "--members", "100000",
                           "--workers", "2", *CORE])
        print(f" 100000 members  {t:8.1f} s on 2 threads  stages: {stage_seconds(work / 'n100000t')}")
    if not args.quick:
        section("6. the test suite (the README's test command, in this environment)")
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "pytest", "-q", "tests"], cwd=ROOT, capture_output=True, text=True)
        tail = (proc.stdout.strip().splitlines() or ["(no output)"])[-1]
        print(f"{time.perf_counter() - t0:7.1f} s wall: {tail}  (budget 6 min on 2 cores)")
    targets(tf, tf1, rates, work / "full", tpoll, engine_rates, work / "full1", report_cpu, ceiling)
    print(f"\n(work files in {work})")
    return 0


# What stood in the way of each target when it was last measured (2026-12-05); the figures beside
# them are this run's (the whole demo's and the threads' obstacles are read from this run's stages).
IN_THE_WAY = {
    "pollinator case": "its regime screen and report",
    "report": "WeasyPrint's layout and writing alone (about 3.5 s for the 17 pages; 4b names its parts)",
    "engine with SIMD": "a block runs as long as its slowest member (about 70 % of lane steps useful in member order; "
                        "with the members sorted by step count, section 0's 'lanes, sorted', it gains more; "
                        "calibration sorts by each member's last step size) and each lane's step control is scalar",
    "calibration, 2 threads": "the spin-ups themselves (the compiled kernel is about 85 % of a calibration's CPU "
                              "time), the machine's two-thread ceiling (4a) and, inside a whole run, the later "
                              "stages' libraries imported beside it",
    "decision stage": "the prior screen's simulations (1,920 design points, a spin-up and every option each: about "
                      "1 CPU s), the press signs' equilibria (0.2 s) and its threads competing for the two cores",
}


def where_the_time_goes(wall: float, stages: dict) -> str:
    """The run's largest parts, this run's figures: its stages and the rest (start-up, report)."""
    parts = {**stages, "outside the stages (start-up, imports, report)": wall - sum(stages.values())}
    top = sorted(parts.items(), key=lambda kv: -kv[1])[:3]
    return "largest parts of this run: " + "; ".join(f"{k} {v:.1f} s" for k, v in top)


def serial_stages(threads: dict, alone: dict) -> str:
    """Stages two threads speed up less than SERIAL_RATIO, this run's figures."""
    slow = [f"{k} ({alone[k]:.1f} s -> {v:.1f} s)" for k, v in threads.items()
            if k in alone and v > 0 and alone[k] / v < SERIAL_RATIO]
    return "stages two threads barely speed up: " + ("; ".join(slow) or "none")


def targets(full: float, in_process: float, rates: dict, results: Path, pollinator: float, engine: dict,
            alone: Path | None = None, report: float = float("nan"), ceiling: float = float("nan")) -> None:
    """Each target of the whole assessment beside this run's figure, met or not, and what stood in its way."""
    stages = json.loads((results / "manifest.json").read_text())["execution"].get("stage_seconds", {})
    alone_stages = json.loads((alone / "manifest.json").read_text())["execution"].get("stage_seconds", {}) \
        if alone is not None else {}
    IN_THE_WAY["full demo, warm"] = where_the_time_goes(full, stages)
    IN_THE_WAY["two threads"] = (serial_stages(stages, alone_stages) + f" (see 4a); the report is one thread; "
                                 f"this machine's own two-thread ceiling for compiled code was {ceiling:.2f}x")
    simd = engine["lanes"] / engine["compiled"]
    rows = [("full demo, warm", f"{full:.1f} s", "<= 15 s", full <= 15.0),
            ("engine with SIMD", f"{simd:.2f}x the scalar kernel", ">= 2x", simd >= 2.0),
            ("pollinator case", f"{pollinator / full:.2f}x the demo", "<= 1.5x", pollinator <= 1.5 * full),
            ("calibration, 2 threads", f"{rates.get('2', float('nan')):,.0f} simulations/s", ">= 15,000",
             rates.get("2", 0.0) >= 15_000),
            ("decision stage", f"{stages.get('sensitivity', float('nan')):.1f} s", "<= 1 s",
             stages.get("sensitivity", float("inf")) <= 1.0),
            ("report", f"{report:.1f} CPU s in-process", "<= 3 s", report <= 3.0),
            ("two threads", f"{in_process / full:.2f}x the in-process run", ">= 1.6x", in_process / full >= 1.6)]
    section("targets: this run's figures (the engine's and the report's parts are in sections 0 and 4b)")
    for name, got, want, met in rows:
        print(f"{name:24s} {got:>28s}  target {want:10s} {'met' if met else 'NOT met: ' + IN_THE_WAY[name]}")


if __name__ == "__main__":
    sys.exit(main())
