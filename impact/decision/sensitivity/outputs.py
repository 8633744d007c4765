"""The food web as a model of unit rows: every per-point output, its chance-event stream, and the
chunked, checkpointed evaluation through an executor."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from impact.case import Case


PLAUSIBLE = ("baseline", "plausible", "all")  # label of the "baseline is plausible" indicator


def output_labels(case: Case) -> list[tuple[str, str, str]]:
    """(option, metric, species) of every per-point output, in column order."""
    labels = [PLAUSIBLE]
    for opt in ["baseline", *[o.name for o in case.options]]:
        for sp in case.species:
            labels.append((opt, "final", sp.name))
            labels.append((opt, "mean_abundance", sp.name))
            if sp.present:
                labels.append((opt, "minimum", sp.name))
                labels.append((opt, "time_below", sp.name))
                labels.append((opt, "quasi_extinct", sp.name))
            if sp.outbreak is not None:
                labels.append((opt, "outbreak", sp.name))
            if opt != "baseline":
                labels.append((opt, "mean_change", sp.name))
    return labels


METRIC_TEXT = {
    "plausible": "1 if the baseline spin-up is a plausible picture of today, else 0",
    "final": "abundance at the horizon",
    "mean_abundance": "time-mean abundance over [0, horizon]",
    "minimum": "minimum abundance over [0, horizon]",
    "time_below": "share of recorded times in [0, horizon] below the quasi-extinction level",
    "quasi_extinct": "1 if the abundance fell below the quasi-extinction level by the horizon, else 0",
    "outbreak": "1 if the abundance exceeded the outbreak level by the horizon, else 0",
    "mean_change": "paired relative change of time-mean abundance vs baseline on the same point",
}


def point_metrics(case: Case, dr) -> tuple[np.ndarray, dict[str, int]]:
    """Every per-point output of :func:`output_labels` from one :class:`DesignRuns`.

    Returns
    -------
    Y : ndarray (N, K)
        NaN where the point failed numerically (spin-up or that option's run).
    failures : dict option -> count of failed points
    """
    from impact.risk import metrics as mx

    H = case.horizon
    spin_failed = np.asarray(dr.verdict["failed"], bool)
    base = dr.runs["baseline"]
    means = {}
    failed = {}
    for opt, run in dr.runs.items():
        failed[opt] = spin_failed | np.asarray(run.failed, bool)
        means[opt] = [mx.time_mean(run.times, run.states[:, :, j], H) for j in range(len(case.species))]
    cols = []
    for opt, metric, sp in output_labels(case):
        if metric == "plausible":
            cols.append(np.where(spin_failed, np.nan, np.asarray(dr.verdict["kept"], float)))
            continue
        run = dr.runs[opt]
        j = case.species_names.index(sp)
        s = case.species[j]
        if metric == "final":
            v = run.states[:, -1, j]
        elif metric == "mean_abundance":
            v = means[opt][j]
        elif metric == "minimum":
            v = run.cummin[:, -1, j]
        elif metric == "time_below":
            sel = run.times <= H + 1e-12
            with np.errstate(invalid="ignore"):
                v = (run.states[:, sel, j] < s.quasi_extinction).mean(axis=1).astype(float)
        elif metric == "quasi_extinct":
            with np.errstate(invalid="ignore"):
                v = (run.cummin[:, -1, j] < s.quasi_extinction).astype(float)
        elif metric == "outbreak":
            with np.errstate(invalid="ignore"):
                v = (run.cummax[:, -1, j] > s.outbreak).astype(float)
        else:  # mean_change
            v = mx.paired_relative_change(means[opt][j], means["baseline"][j])
            v = np.where(failed["baseline"], np.nan, v)
        cols.append(np.where(failed[opt], np.nan, np.asarray(v, float)))
    del base
    return np.column_stack(cols), {opt: int(f.sum()) for opt, f in failed.items()}


def point_streams(unit: np.ndarray) -> np.ndarray:
    """A chance-event stream identity per design point, from the point's own coordinates.

    Each point draws its own chance events (an eradication that may fail), so a parameter that
    only sets an event's probability shows its influence; the identity depends on the point alone,
    never on the chunk it is computed in.
    """
    import hashlib

    rows = np.ascontiguousarray(unit, dtype=np.float64)
    return np.array([int.from_bytes(hashlib.sha1(r.tobytes()).digest()[:7], "little") for r in rows], dtype=np.int64)


@dataclass(frozen=True)
class DesignTask:
    """A chunk of design points (full unit rows) to evaluate."""

    case: Case
    seed: int
    unit: np.ndarray


def design_chunk(task: DesignTask) -> dict[str, np.ndarray]:
    """Spin up and run every option on a chunk of design points (a worker's function).

    Returns
    -------
    dict with ``Y`` (n, K) per-point metrics, ``failed_options`` and ``failed_counts``.
    """
    from impact.risk.runs import evaluate_points

    # the skeleton is deterministic in its parameters: no environmental noise, and every species
    # continuous (births and deaths at low numbers are chance, not a parameter to apportion)
    dr = evaluate_points(task.case, task.unit, task.seed, draws=point_streams(task.unit), noise=False,
                         individuals=False)
    Y, f = point_metrics(task.case, dr)
    return {"Y": Y, "failed_options": np.array(list(f), dtype=str), "failed_counts": np.array(list(f.values()), int)}


@dataclass
class FoodWebModel:
    """The case as a model of unit rows: spin-up, paired options, per-point metrics.

    Deterministic skeleton: environmental noise is off, species counted in individuals at low
    numbers run continuously; each point draws its own chance events
    from a stream named by its coordinates (:func:`point_streams`), so an event probability shows
    its influence like any other parameter.
    ``fixed`` holds unit coordinates of parameters not varied (screened out); ``varied`` the
    columns of ``case.uncertain`` the design moves. Chunks of points go to ``executor`` and,
    with a ``store``, are saved as they finish and reused on a resumed run.
    """

    case: Case
    seed: int
    varied: np.ndarray
    fixed: np.ndarray
    chunk: int = 1024
    failures: dict = field(default_factory=dict)
    points: int = 0
    seconds: float = 0.0
    progress: Callable[[str], None] | None = None
    executor: object = None
    store: object = None

    def __call__(self, unit: np.ndarray) -> np.ndarray:
        import hashlib
        import time

        from impact.run.execute import InProcess, count

        t0 = time.perf_counter()
        n = unit.shape[0]
        full = np.tile(self.fixed, (n, 1))
        full[:, self.varied] = unit
        executor = self.executor or InProcess()
        # an even share per worker, within bounds: every chunk pays a fixed integrator cost
        size = int(np.clip(np.ceil(n / executor.workers), 64, self.chunk))
        starts = list(range(0, n, size))
        keys = [f"design-{hashlib.sha1(np.ascontiguousarray(full[a: a + size]).tobytes()).hexdigest()[:20]}"
                for a in starts]
        parts: dict[int, dict] = {}
        tasks, todo = [], []
        for k, a in enumerate(starts):
            saved = self.store.get(keys[k]) if self.store else None
            if saved is not None:
                parts[k] = saved
            else:
                tasks.append(DesignTask(self.case, self.seed, full[a: a + size]))
                todo.append(k)
        done = sum(p["Y"].shape[0] for p in parts.values())
        count(self.progress, "sensitivity: simulating design points", done, n, "points")
        for i, res in executor.map(design_chunk, tasks):
            parts[todo[i]] = res
            if self.store:
                self.store.put(keys[todo[i]], res)
            done += res["Y"].shape[0]
            count(self.progress, "sensitivity: simulating design points", done, n, "points")
        for p in parts.values():
            for opt, c in zip(p["failed_options"], p["failed_counts"]):
                self.failures[str(opt)] = self.failures.get(str(opt), 0) + int(c)
        self.points += n
        self.seconds += time.perf_counter() - t0
        return np.concatenate([parts[k]["Y"] for k in range(len(starts))], axis=0)


