"""Resource estimate of an assessment, made before any simulation: peak memory and disk space.

The assessment keeps per member and option a float32 trajectory on the output grid and a few
summaries (see :class:`impact.risk.runs.Summary`), builds the members table from them, and holds
one chunk of float64 trajectories per worker while it runs. The estimate counts those arrays
from the case (members, species, output grid, options, horizons) and refuses a run whose peak
would pass :data:`MEMORY_SHARE` of this machine's memory, or whose checkpoints and tables would
not fit on the output's disk, naming the flag or field to change and what would fit.
"""

from __future__ import annotations

import math
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from impact.ensemble.draws import run_chunk_size
from impact.risk.runs import summary_times
from impact.case import Case
from impact.errors import CaseError, SettingError

MiB = 2**20
# Interpreter, numpy/scipy/pandas and one screening block. Calibrated on the README's figures
# for the demo case (167 MiB peak at 1,000 members, in-process); a measurement, not a bound.
BASE_MEMORY = 160 * MiB
# A members.csv row in memory: 8 columns with pandas object cells, plus the concatenation copy.
# Chosen so that the estimate matches the README's measured slope for the demo case (about
# 10.5 kB per member between 10k and 100k members).
TABLE_ROW_BYTES = 200
# A members.csv / parameters.csv line on disk (6 significant digits per number).
CSV_ROW_BYTES = 64
# Share of the machine's memory a run may plan to use: the rest is left to the system and to
# other users (common practice, no source).
MEMORY_SHARE = 0.8
# A run's measured peak resident memory stays within this multiple of :func:`estimate`'s figure.
# The estimate counts arrays, not the compiler's working memory: a 50-species web compiled on first
# use peaked at 1.8 times it (tests/engine/test_bounded_work.py checks the margin; common practice,
# no source).
MEMORY_MARGIN = 2.5
# The report, summary and small tables together stay below this (demo: about 1.5 MiB).
FIXED_DISK = 8 * MiB


@dataclass(frozen=True)
class Estimate:
    """What a run of ``members`` members will need, in bytes.

    Attributes
    ----------
    members, runs, output_points, n_state, workers : int
        Ensemble size, runs per member (baseline and options), points of the output grid,
        state columns, and local workers the estimate assumes (each holding one chunk).
    per_member : int
        Memory that grows with each member (summaries kept, bands and members table).
    fixed : int
        Memory that does not: the interpreter and one chunk of trajectories per worker.
    memory : int
        Estimated peak memory, ``fixed + members * per_member``.
    disk : int
        Checkpoints (kept until the run completes) plus the results tables.
    memory_limit, disk_free : int or None
        :data:`MEMORY_SHARE` of this machine's memory, and free space where the results go
        (None when unknown: no check is made).
    """

    members: int
    runs: int
    output_points: int
    n_state: int
    workers: int
    per_member: int
    fixed: int
    memory: int
    disk: int
    memory_limit: int | None
    disk_free: int | None

    def describe(self) -> str:
        """One line for ``impact check`` and the start of ``impact assess``."""
        limit = f" (limit {_size(self.memory_limit)})" if self.memory_limit else ""
        free = f", {_size(self.disk_free)} free" if self.disk_free is not None else ""
        return (f"estimate for {self.members:,} members x {self.runs} runs x {self.output_points:,} output points: "
                f"peak memory about {_size(self.memory)}{limit}, disk about {_size(self.disk)}{free}")


def _size(n: float) -> str:
    for unit, scale in (("TiB", 2**40), ("GiB", 2**30), ("MiB", MiB)):
        if n >= scale:
            return f"{n / scale:.3g} {unit}"
    return f"{n / 2**10:.3g} KiB"


def machine_memory() -> int | None:
    """Physical memory, or the container's memory limit when that is lower (bytes)."""
    total = None
    try:
        total = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        pass
    for f in ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"):
        try:
            v = int(Path(f).read_text().strip())
        except (OSError, ValueError):
            continue
        if 0 < v < (total or math.inf):
            total = v
    return total


def free_disk(where: Path) -> int | None:
    """Free bytes on the file system that holds ``where`` (or its nearest existing parent)."""
    p = Path(os.path.abspath(where))
    while not p.exists() and p != p.parent:
        p = p.parent
    try:
        return shutil.disk_usage(p).free
    except OSError:
        return None


def estimate(case: Case, members: int, workers: int = 1, out: Path | None = None,
             memory: int | None = ..., disk_free: int | None = ...) -> Estimate:
    """Peak memory and disk space of ``impact assess`` for ``members`` members.

    ``memory`` and ``disk_free`` default to this machine's (:func:`machine_memory`, and
    :func:`free_disk` at ``out``); pass numbers to judge another machine, or None to skip.
    """
    S = len(case.species)
    n = S + int(case.carrion is not None)
    runs = 1 + len(case.options)
    T = int(math.floor(case.horizon / case.output_step + 1e-9)) + 1
    H = len(summary_times(case))
    D = len(case.uncertain) + (case.structures is not None)  # and the uniform that picks the structure
    # Summary per run: trajectory (T, n) float32, min and max (H, n), mean (H, S), recovery (S,),
    # final (n,), failed and reason; per member: unit draws, parameter values and today's state.
    kept = runs * (4 * T * n + 8 * (2 * H * n + H * S + S + n) + 2) + 8 * (2 * D + n)
    per_member = kept + 4 * T * n + runs * S * TABLE_ROW_BYTES  # + one option's bands copy, members table
    chunk = min(members, run_chunk_size(members, workers, runs))
    fixed = BASE_MEMORY + workers * chunk * T * n * 8 * 2  # float64 states of a chunk, and their float32 copy
    tables = members * (runs * S + 1) * CSV_ROW_BYTES + runs * S * T * 7 * 12 + FIXED_DISK
    return Estimate(members, runs, T, n, workers, per_member, fixed, fixed + members * per_member,
                    members * kept + tables, machine_memory() if memory is ... else memory,
                    (free_disk(out) if out is not None else None) if disk_free is ... else disk_free)


def check_fits(est: Estimate, case: Case, members_given: bool):
    """Refuse a run that would not fit, naming what to change and what would fit.

    Parameters
    ----------
    members_given : bool
        The member count was a run setting (the error is then a :class:`SettingError` for
        ``members``), not the case file's ``case.members``.
    """

    def too_many(message: str) -> Exception:
        return SettingError("members", message) if members_given else CaseError(case.path, "case.members", message)

    if est.memory_limit is not None and est.memory > est.memory_limit:
        room = est.memory_limit - est.fixed
        fit = room // est.per_member if room > 0 else 0
        if fit < min(est.members, 100):
            # the output grid itself is too fine: memory grows in proportion to its points
            factor = est.memory / est.memory_limit
            raise CaseError(case.path, "case.output_step",
                            f"an output grid of {est.output_points:,} points needs about {_size(est.memory)} of "
                            f"memory for {est.members:,} members, more than the {_size(est.memory_limit)} allowed "
                            f"({MEMORY_SHARE:.0%} of this machine's); an output_step of at least "
                            f"{case.output_step * factor:.3g} {case.time_unit} would fit")
        raise too_many(f"{est.members:,} members need about {_size(est.memory)} of memory, more than "
                                        f"the {_size(est.memory_limit)} allowed ({MEMORY_SHARE:.0%} of this machine's); "
                                        f"at most about {fit:,} members fit")
    if est.disk_free is not None and est.disk > est.disk_free:
        per = max(1, (est.disk - FIXED_DISK) // max(est.members, 1))
        fit = max(0, (est.disk_free - FIXED_DISK) // per)
        raise too_many(f"{est.members:,} members need about {_size(est.disk)} on disk for checkpoints "
                                        f"and tables, but only {_size(est.disk_free)} is free there; at most about "
                                        f"{fit:,} members fit (or choose a results folder `out` on a larger disk)")
