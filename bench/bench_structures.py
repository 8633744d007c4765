"""Cost of structural doubts: the demo's core stage (draws from the priors, then baseline and every
option on the same members) with 8 webs against the same case with its doubts removed, at the same
member count, in this process (1 worker).

The 8 webs come from three doubts on the demo's web (invented for the benchmark): whether rats eat
skinks, whether the cats' intake of rats saturates or is sigmoid, and whether cats eat skinks. Every
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

from impact.assess import assess_members, draw_ensemble  # noqa: E402
from impact.case import load_case  # noqa: E402

DEMO = ROOT / "casework" / "island_mesopredator.toml"
EXTRA = '''doubt = { name = "cat predation on skinks", label = "cats eat skinks", exists = 0.7, absent = "cats do not eat skinks" }
'''


def variants(work: Path) -> tuple[Path, Path]:
    """The demo without data (core stage) with 8 webs, and the same with no doubt at all."""
    base = prior_only(DEMO, work).read_text()
    cat_skink = "attack_rate = 0.1\nhandling_time = 0.01\nefficiency = 0.01\n"
    eight = base.replace(cat_skink, cat_skink + EXTRA, 1)
    one = "\n".join(line for line in base.splitlines() if not line.startswith(("doubt =", "  { label"))) + "\n"
    (work / "eight.toml").write_text(eight)
    (work / "one.toml").write_text(one)
    return work / "eight.toml", work / "one.toml"


def core(case, members: int) -> float:
    t = time.process_time()  # CPU seconds: the machine may be shared
    ens = draw_ensemble(case, members, case.seed)
    assess_members(case, ens, case.seed)
    return time.process_time() - t


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
        t8 = min(core(eight, args.members) for _ in range(args.repeats))
        t1 = min(core(one, args.members) for _ in range(args.repeats))
    print(f"core stage, {args.members} members, 1 worker: 8 webs {t8:.2f} CPU s, 1 web {t1:.2f} CPU s, ratio {t8 / t1:.2f}× "
          "(target ≤ 1.3×)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
