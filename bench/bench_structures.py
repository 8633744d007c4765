"""Cost of structural doubts: the demo's core stage (draws from the priors, then baseline and every
option on the same members) with 8 webs against the same case with its doubts removed, at the same
member count, in this process (1 worker).

The 8 webs come from three doubts on the demo's web (invented for the benchmark, see variants()). Every
web runs in the one compiled kernel of the union web (a switched-off link has a zero attack rate),
so the target is at most 1.3× the single web's time. The kernels of both webs are compiled (or
loaded) before the clock starts.

    python bench/bench_structures.py [--members 2000] [--repeats 2]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from run import prior_only  # noqa: E402
from timing import ROOT  # noqa: E402

from impact.risk.runs import assess_members
from impact.ensemble.draws import draw_ensemble  # noqa: E402
from impact.case import load_case  # noqa: E402

DEMO = ROOT / "casework" / "island_mesopredator.toml"
CAT_SKINK = "attack_rate = 0.1\nhandling_time = 0.01\nefficiency = 0.01\n"
RAT_MOTH = "attack_rate = 0.004\nhandling_time = 0.01\nefficiency = 0.3\n"
DOUBTS = {
    CAT_SKINK: 'doubt = { name = "cat predation on skinks", label = "cats eat skinks", exists = 0.7, '
               'absent = "cats do not eat skinks" }\n',
    RAT_MOTH: 'doubt = { name = "rat predation on moths", label = "rats eat moths", exists = 0.7, '
              'absent = "rats do not eat moths" }\n',
}


def variants(work: Path) -> tuple[Path, Path]:
    """The demo without data (core stage) with 8 webs, and the same with no doubt at all.

    The 8 webs: the demo's doubt on the cats' intake of rats (saturating or sigmoid) and two more on
    links whose absence keeps today's web plausible about as often (cats eating skinks, rats eating
    moths), so both cases screen about as many draws per member kept; the demo's doubt on rats
    eating skinks is left out (without it most draws lose a species, which costs draws, not webs)."""
    base = prior_only(DEMO, work).read_text()
    lines = base.splitlines(keepends=True)
    keep = "".join(x for x in lines if "rat predation on skinks" not in x)
    one = "".join(x for x in lines if not x.startswith(("doubt =", "  { label")))
    eight = keep
    for anchor, doubt in DOUBTS.items():
        eight = eight.replace(anchor, anchor + doubt, 1)
    (work / "eight.toml").write_text(eight)
    (work / "one.toml").write_text(one)
    return work / "eight.toml", work / "one.toml"


def core(case, members: int) -> tuple[float, float, int]:
    """CPU seconds (the machine may be shared) of the draws and of the option runs, and the draws tried."""
    t = time.process_time()
    ens = draw_ensemble(case, members, case.seed)
    t_draw = time.process_time() - t
    t = time.process_time()
    assess_members(case, ens, case.seed)
    return t_draw, time.process_time() - t, ens.counts["tried"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--members", type=int, default=2000)
    ap.add_argument("--repeats", type=int, default=2)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        eight_path, one_path = variants(Path(tmp))
        eight, one = load_case(eight_path), load_case(one_path)
        assert eight.structures is not None and len(eight.structures.structures) == 8 and one.structures is None
        for case in (eight, one):  # compile or load the kernels first
            core(case, 50)
        # interleaved, so that a change in the machine's load falls on both alike; the least of each
        runs = [(core(eight, args.members), core(one, args.members)) for _ in range(args.repeats)]
        r8 = min((a for a, _ in runs), key=lambda r: r[0] + r[1])
        r1 = min((b for _, b in runs), key=lambda r: r[0] + r[1])
    t8, t1 = r8[0] + r8[1], r1[0] + r1[1]
    print(f"core stage, {args.members} members, 1 worker, CPU s: 8 webs {t8:.2f} (draws {r8[0]:.2f}, {r8[2]} tried; "
          f"option runs {r8[1]:.2f}), 1 web {t1:.2f} (draws {r1[0]:.2f}, {r1[2]} tried; option runs {r1[1]:.2f}); "
          f"ratio {t8 / t1:.2f}× (target ≤ 1.3×), option runs alone {r8[1] / r1[1]:.2f}×")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
