"""Cost of press_signs.csv (what the structure alone decides) for a 12-species web.

Usage::

    python bench/bench_press.py [--members M] [--repeats R]

An invented 12-species web (four logistic plants, four herbivores, three predators sharing them and
an apex predator eating the predators, Lotka–Volterra and saturating links) is drawn and run once
(not timed); then, in CPU seconds (``time.process_time``, minimum of R): the loop analysis alone
(adjoint of −A, absolute feedback matrix and weighted predictions of the 12 × 12 signed web, exact
integers) and the whole table (the same plus every member's baseline equilibrium, its Jacobian,
stability and −J⁻¹). Target (issue 21): the sign table in at most 1 s for a 12-species web.

Measured 2026-12-04 on a shared 2-core machine under load (load average 10), 1,000 members, all
at a stable equilibrium: loop analysis 0.009 CPU s (0.009 s for a dense 12 x 12 signed web, every
pair linked); whole table 0.43-0.47 CPU s, within the 1 s target. Most of it is Newton's method
for the members' equilibria (impact.dynamics.timescales.equilibrium, which iterates every member until the
last converges) and its Jacobians.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from timing import cpu_min  # noqa: E402


def web_toml(members: int) -> str:
    """The invented 12-species case as TOML text."""
    lines = ['[case]', 'title = "twelve species (invented benchmark web)"', 'time_unit = "year"', 'horizon = 20.0',
             'output_step = 1.0', 'spinup = 100.0', f'members = {members}', 'seed = 1', '',
             '[parameters.plant_r]', 'distribution = "uniform"', 'low = 0.8', 'high = 1.2', 'unit = "1/year"', '']
    for i in range(4):
        lines += ['[[species]]', f'name = "plant{i}"', 'growth = "logistic"', 'growth_rate = "plant_r"',
                  'carrying_capacity = 100.0', 'initial = 50.0', 'quasi_extinction = 1e-6', '']
    for i in range(4):
        lines += ['[[species]]', f'name = "herbivore{i}"', 'growth = "none"', 'mortality = 0.3', 'initial = 10.0',
                  'quasi_extinction = 1e-6', '']
    for k in range(3):
        lines += ['[[species]]', f'name = "predator{k}"', 'growth = "none"', 'mortality = 0.1', 'initial = 2.0',
                  'quasi_extinction = 1e-6', '']
    lines += ['[[species]]', 'name = "apex"', 'growth = "none"', 'mortality = 0.05', 'initial = 0.5',
              'quasi_extinction = 1e-6', '']

    def link(pred, prey, a, e, response="holling1", h=None):
        out = ['[[interactions]]', 'kind = "predation"', f'predator = "{pred}"', f'prey = "{prey}"',
               f'response = "{response}"', f'attack_rate = {a}', f'efficiency = {e}']
        return out + ([f'handling_time = {h}'] if h is not None else []) + ['']

    for i in range(4):
        lines += link(f"herbivore{i}", f"plant{i}", 0.02, 0.5)
        lines += link(f"herbivore{i}", f"plant{(i + 1) % 4}", 0.005, 0.5)
    for k in range(3):
        lines += link(f"predator{k}", f"herbivore{k}", 0.01, 0.3, "holling2", 0.05)
        lines += link(f"predator{k}", f"herbivore{k + 1}", 0.01, 0.3, "holling2", 0.05)
        lines += link("apex", f"predator{k}", 0.02, 0.2)
    lines += ['[[interventions]]', 'name = "apex cull"', 'kind = "press-harvest"', 'species = "apex"', 'rate = 0.1',
              'start = 0.0', 'end = 20.0', '', '[[interventions]]', 'name = "herbivore cull"', 'kind = "press-harvest"',
              'species = "herbivore0"', 'rate = 0.1', 'start = 0.0', 'end = 20.0', '',
              '[[options]]', 'name = "cull apex"', 'interventions = ["apex cull"]', '',
              '[[options]]', 'name = "cull herbivores"', 'interventions = ["herbivore cull"]', '',
              '[risk]', 'horizons = [20.0]', 'min_members = 10', '']
    return "\n".join(lines)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--members", type=int, default=1000)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args(argv)

    from impact.risk.runs import assess_members
    from impact.ensemble.calibrate import build_ensemble
    from impact.case import load_case
    from impact.dynamics.loops import press_prediction
    from impact.dynamics.press import community_signs, press_table

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "twelve.toml"
        path.write_text(web_toml(args.members), encoding="utf-8")
        case = load_case(path)
    ens, _ = build_ensemble(case, args.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    community = community_signs(case)
    t_loops, _ = cpu_min(lambda: press_prediction(community.signs), args.repeats)
    t_table, (table, record) = cpu_min(lambda: press_table(case, ens.params, ens.values, runs["baseline"]),
                                       args.repeats)
    print(f"web: {len(community.names)} nodes; {len(ens.draws)} members, {record['members_compared']} at a stable "
          f"baseline equilibrium keeping every species; {len(table)} table rows")
    print(f"loop analysis alone (exact integers): {t_loops:.3f} CPU s")
    import numpy as np

    dense = np.random.default_rng(0).choice([-1, 1], (12, 12))  # every pair linked: the costliest 12-node web
    t_dense, _ = cpu_min(lambda: press_prediction(dense), args.repeats)
    print(f"loop analysis of a dense 12 x 12 signed web (every pair linked): {t_dense:.3f} CPU s")
    print(f"whole press_signs table: {t_table:.3f} CPU s (target: at most 1 s)")


if __name__ == "__main__":
    main()
