"""Which uncertain parameters drive each risk: Sobol global sensitivity (SALib), Morris screening.

Layers, from the bottom up:

* :class:`SobolDesign` / :func:`sobol_design` — a Saltelli design on the unit hypercube that
  carries its own layout (N, D, second-order flag); :class:`MorrisDesign` likewise.
* :func:`sobol_indices` — SALib's estimator on one design and a matrix of outputs, with the
  failure rule (blocks holding a failed point are dropped whole, and the output is refused
  when too many points failed).
* :func:`sobol_study` — the generic entry point: any model ``f(unit rows (n, D)) -> (n, K)``
  through design, estimation and the N/2 convergence check.  Tests feed analytic functions
  through exactly this path; :func:`food_web_model` makes the food web such a function.
* :func:`sensitivity_stage` — the assessment stage: tidy tables for the results directory.

Numerics only; no file I/O and no printing.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from .case import Case
from .errors import CaseError, SettingError

PURPOSE_SENSITIVITY = 7  # spawn-key purpose for the design scramble and the bootstrap
UNIT_EPS = 1e-10  # keep quasi-random points off the cube faces, where some inverse CDFs are infinite

DEFAULT_TOLERANCE = 0.2  # widest acceptable full CI width (±0.1) and N/2→N shift of an index (common practice, no source)
DEFAULT_FAILURE_LIMIT = 0.05  # largest acceptable share of failed design points (common practice, no source)
SCREEN_ABOVE = 20  # screen with Morris first when more uncertain parameters than this
SCREEN_KEEP = 0.1  # keep parameters whose mu* is at least this share of the largest (common practice, no source)
MIN_BLOCKS = 8  # fewer surviving base samples than this cannot support a bootstrap CI

UnitModel = Callable[[np.ndarray], np.ndarray]


def _rng(seed: int, *key: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(PURPOSE_SENSITIVITY, *key))))


def _int_seed(seed: int, *key: int) -> int:
    # SALib treats a seed of 0 as "no seed" (global state); derive a non-zero one from our path
    return int(_rng(seed, *key).integers(1, 2**31 - 1))


def _problem(names: Sequence[str]) -> dict:
    return {"num_vars": len(names), "names": list(names), "bounds": [[0.0, 1.0]] * len(names)}


# --------------------------------------------------------------------------------------------
# designs


@dataclass(frozen=True)
class SobolDesign:
    """A Saltelli design on the unit hypercube with its layout.

    Attributes
    ----------
    N : int
        Base samples (blocks).
    D : int
        Parameters varied.
    second_order : bool
        Whether the B_A blocks needed for second-order indices are present.
    names : tuple of str (D,)
    unit : ndarray (N * step, D)
        Rows in SALib's order: block i holds A_i, AB_i^(1..D), [BA_i^(1..D)], B_i.
    """

    N: int
    D: int
    second_order: bool
    names: tuple
    unit: np.ndarray = field(repr=False)

    @property
    def step(self) -> int:
        """Rows per base sample."""
        return 2 * self.D + 2 if self.second_order else self.D + 2

    @property
    def runs(self) -> int:
        return self.N * self.step

    def block_of_rows(self) -> np.ndarray:
        """Base-sample index of every row: (runs,)."""
        return np.repeat(np.arange(self.N), self.step)

    def head(self, n: int) -> "SobolDesign":
        """The design made of the first ``n`` base samples (a Sobol' prefix is itself a design)."""
        if not 0 < n <= self.N:
            raise ValueError(f"head({n}) of a design with N={self.N}")
        return SobolDesign(n, self.D, self.second_order, self.names, self.unit[: n * self.step])

    def base_rows(self) -> np.ndarray:
        """Row indices of the A and B matrices (independent draws from the prior): (2N,)."""
        starts = np.arange(self.N) * self.step
        return np.concatenate([starts, starts + self.step - 1])

    def problem(self) -> dict:
        return _problem(self.names)


def sobol_design(names: Sequence[str], N: int, second_order: bool, seed: int) -> SobolDesign:
    """Saltelli's cross-sampling of a scrambled Sobol' sequence (Saltelli 2002; Saltelli et al. 2010)."""
    from SALib.sample import sobol as sobol_sample

    names = tuple(names)
    if N < 2 or N & (N - 1):
        raise ValueError(f"base samples must be a power of two >= 2, got {N}")
    u = sobol_sample.sample(_problem(names), N, calc_second_order=second_order, scramble=True,
                            seed=_rng(seed, 0))
    return SobolDesign(N, len(names), bool(second_order), names, np.clip(u, UNIT_EPS, 1.0 - UNIT_EPS))


@dataclass(frozen=True)
class MorrisDesign:
    """Morris one-at-a-time trajectories on the unit hypercube with their layout.

    Attributes
    ----------
    trajectories : int
    D : int
    levels : int
    names : tuple of str (D,)
    unit : ndarray (trajectories * (D + 1), D)
    """

    trajectories: int
    D: int
    levels: int
    names: tuple
    unit: np.ndarray = field(repr=False)

    @property
    def runs(self) -> int:
        return self.trajectories * (self.D + 1)


def morris_design(names: Sequence[str], trajectories: int, seed: int, levels: int = 4) -> MorrisDesign:
    """Elementary-effect trajectories (Morris 1991) from SALib."""
    from SALib.sample import morris as morris_sample

    names = tuple(names)
    u = morris_sample.sample(_problem(names), trajectories, num_levels=levels, seed=_int_seed(seed, 1))
    return MorrisDesign(trajectories, len(names), levels, names, np.clip(u, UNIT_EPS, 1.0 - UNIT_EPS))


# --------------------------------------------------------------------------------------------
# estimators


@dataclass(frozen=True)
class Indices:
    """Sobol indices of one output.

    Attributes
    ----------
    status : str
        ``ok``, ``constant`` (no variance to apportion) or ``refused`` (too many failures).
    S1, S1_conf, ST, ST_conf : ndarray (D,)
        ``*_conf`` is the bootstrap half-width at the requested confidence (NaN unless ok).
    S2, S2_conf : ndarray (D, D) or None
        Upper triangle filled when the design has second-order blocks.
    failed_points : int
        Design points without a finite value.
    blocks_used : int
        Base samples entering the estimate (blocks with a failed point are dropped whole).
    message : str
    """

    status: str
    S1: np.ndarray
    S1_conf: np.ndarray
    ST: np.ndarray
    ST_conf: np.ndarray
    S2: np.ndarray | None
    S2_conf: np.ndarray | None
    failed_points: int
    blocks_used: int
    message: str = ""


def _empty(design: SobolDesign, status: str, failed: int, used: int, message: str) -> Indices:
    D = design.D
    fill = 0.0 if status == "constant" else np.nan
    s2 = np.full((D, D), np.nan) if design.second_order else None
    if s2 is not None and status == "constant":
        s2[np.triu_indices(D, 1)] = 0.0
    z = np.full(D, fill)
    return Indices(status, z, z.copy(), z.copy(), z.copy(), s2, None if s2 is None else s2.copy(), failed, used, message)


def sobol_indices(design: SobolDesign, y: np.ndarray, *, confidence: float = 0.95, resamples: int = 100,
                  failure_limit: float = DEFAULT_FAILURE_LIMIT, seed: int = 0) -> Indices:
    """First-, total- and second-order Sobol indices with bootstrap CIs (Saltelli et al. 2010; SALib).

    Parameters
    ----------
    design : SobolDesign
    y : ndarray (design.runs,)
        One output per design row; NaN marks a failed point.
    failure_limit : float
        Largest share of failed points for which indices are still presented.
    """
    from SALib.analyze import sobol as sobol_analyze

    y = np.asarray(y, float)
    if y.shape != (design.runs,):
        raise ValueError(f"expected {design.runs} outputs for this design, got shape {y.shape}")
    bad = ~np.isfinite(y)
    n_bad = int(bad.sum())
    good_block = ~bad.reshape(design.N, design.step).any(axis=1)
    used = int(good_block.sum())
    if n_bad > failure_limit * design.runs:
        return _empty(design, "refused", n_bad, used,
                      f"{n_bad} of {design.runs} design points ({n_bad / design.runs:.1%}) have no value, "
                      f"more than the declared limit of {failure_limit:.0%}; indices are not presented")
    if used < MIN_BLOCKS:
        return _empty(design, "refused", n_bad, used,
                      f"only {used} complete base samples remain (at least {MIN_BLOCKS} needed)")
    yk = y.reshape(design.N, design.step)[good_block].ravel()
    if np.ptp(yk) <= 1e-12 * max(1.0, float(np.abs(yk).max())):
        return _empty(design, "constant", n_bad, used, "the output does not vary over the design")
    with warnings.catch_warnings():
        # SALib warns when a bootstrap resample of an indicator happens to be constant; harmless here
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("ignore", UserWarning)
        S = sobol_analyze.analyze(design.problem(), yk, calc_second_order=design.second_order,
                                  num_resamples=resamples, conf_level=confidence, seed=_int_seed(seed, 2))
    s2 = np.asarray(S["S2"], float) if design.second_order else None
    s2c = np.asarray(S["S2_conf"], float) if design.second_order else None
    msg = f"{n_bad} failed points; {design.N - used} base samples dropped" if n_bad else ""
    return Indices("ok", np.asarray(S["S1"], float), np.asarray(S["S1_conf"], float),
                   np.asarray(S["ST"], float), np.asarray(S["ST_conf"], float), s2, s2c, n_bad, used, msg)


def morris_effects(design: MorrisDesign, y: np.ndarray, *, seed: int = 0) -> dict[str, np.ndarray]:
    """Elementary-effect summaries mu* and sigma (Morris 1991; Campolongo et al. 2007; SALib).

    Parameters
    ----------
    y : ndarray (design.runs,)
        NaN values are replaced by the output median so one failure does not void a trajectory.

    Returns
    -------
    dict with ndarrays (D,): ``mu_star``, ``sigma``, ``mu_star_conf``
    """
    from SALib.analyze import morris as morris_analyze

    y = np.asarray(y, float)
    ok = np.isfinite(y)
    if not ok.any() or np.ptp(y[ok]) == 0:
        z = np.zeros(design.D)
        return {"mu_star": z, "sigma": z.copy(), "mu_star_conf": z.copy()}
    y = np.where(ok, y, np.median(y[ok]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        S = morris_analyze.analyze(_problem(design.names), design.unit, y, num_levels=design.levels,
                                   seed=_int_seed(seed, 3))
    return {k: np.asarray(S[k], float) for k in ("mu_star", "sigma", "mu_star_conf")}


def convergence(full: Indices, half: Indices, tolerance: float) -> dict:
    """Shift of the indices from N/2 to N and CI width at N, against a declared tolerance."""
    if full.status != "ok" or half.status != "ok":
        conv = full.status == "constant" and half.status == "constant"
        return dict(max_shift=0.0 if conv else np.nan, max_ci_width=0.0 if conv else np.nan,
                    tolerance=tolerance, converged=conv)
    shift = float(np.nanmax(np.abs(np.r_[full.S1 - half.S1, full.ST - half.ST])))
    width = float(np.nanmax(2.0 * np.r_[full.S1_conf, full.ST_conf]))
    return dict(max_shift=shift, max_ci_width=width, tolerance=tolerance,
                converged=bool(shift <= tolerance and width <= tolerance))


# --------------------------------------------------------------------------------------------
# the generic study


@dataclass(frozen=True)
class Study:
    """A whole Sobol study of a model with K outputs.

    Attributes
    ----------
    design : SobolDesign
    outputs : ndarray (design.runs, K)
    indices : list of Indices (K,)
        At N base samples.
    half : list of Indices (K,)
        At N/2 (the first half of the same design).
    convergence : list of dict (K,)
    """

    design: SobolDesign
    outputs: np.ndarray
    indices: list
    half: list
    convergence: list


def sobol_study(model: UnitModel, names: Sequence[str], N: int, *, second_order: bool = False, seed: int = 0,
                confidence: float = 0.95, resamples: int = 100, tolerance: float = DEFAULT_TOLERANCE,
                failure_limit: float = DEFAULT_FAILURE_LIMIT) -> Study:
    """Design, run and estimate: the one path used for analytic checks and for the food web.

    Parameters
    ----------
    model : callable, unit rows ndarray (n, D) -> ndarray (n, K)
        Maps points of the unit hypercube to K outputs (NaN for a failed point).
    """
    design = sobol_design(names, N, second_order, seed)
    Y = np.asarray(model(design.unit), float)
    if Y.ndim == 1:
        Y = Y[:, None]
    half_design = design.head(N // 2)
    kw = dict(confidence=confidence, resamples=resamples, failure_limit=failure_limit, seed=seed)
    full = [sobol_indices(design, Y[:, k], **kw) for k in range(Y.shape[1])]
    half = [sobol_indices(half_design, Y[: half_design.runs, k], **kw) for k in range(Y.shape[1])]
    conv = [convergence(f, h, tolerance) for f, h in zip(full, half)]
    return Study(design, Y, full, half, conv)


def through_priors(f: Callable[[np.ndarray], np.ndarray], priors: Sequence) -> UnitModel:
    """Wrap a model of parameter values as a model of unit rows, mapping each column by its prior's ppf."""
    def model(unit: np.ndarray) -> np.ndarray:
        X = np.column_stack([p.ppf(unit[:, j]) for j, p in enumerate(priors)])
        return f(X)
    return model


# --------------------------------------------------------------------------------------------
# the food web as a model of unit rows

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
    from . import metrics as mx

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
    from .assess import evaluate_points

    dr = evaluate_points(task.case, task.unit, task.seed, draws=point_streams(task.unit), noise=False)
    Y, f = point_metrics(task.case, dr)
    return {"Y": Y, "failed_options": np.array(list(f), dtype=str), "failed_counts": np.array(list(f.values()), int)}


@dataclass
class FoodWebModel:
    """The case as a model of unit rows: spin-up, paired options, per-point metrics.

    Deterministic skeleton: environmental noise is off; each point draws its own chance events
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

        from .execute import InProcess, count

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


# --------------------------------------------------------------------------------------------
# the stage


@dataclass(frozen=True)
class Settings:
    """Declared settings of the sensitivity stage."""

    base_samples: int = 1024
    second_order: bool = False
    seed: int = 0
    confidence: float = 0.95
    resamples: int = 100
    tolerance: float = DEFAULT_TOLERANCE
    failure_limit: float = DEFAULT_FAILURE_LIMIT
    screen: bool | None = None  # None: screen when more than SCREEN_ABOVE uncertain parameters
    screen_trajectories: int = 20
    screen_keep: float = SCREEN_KEEP
    given_data: bool = True  # also first-order indices on the plausible subset (headline metrics only)


def check_settings(s: Settings):
    """Raise :class:`SettingError` for settings no study can run with."""
    N = s.base_samples
    if N < 16 or N & (N - 1):
        raise SettingError("base_samples", f"must be a power of two of at least 16 (e.g. 256, 1024), got {N}")
    if s.seed < 0:
        raise SettingError("seed", "must be a non-negative whole number")
    if not 0 < s.tolerance < 1:
        raise SettingError("tolerance", f"must lie between 0 and 1, got {s.tolerance}")
    if not 0 <= s.failure_limit < 1:
        raise SettingError("failure_limit", f"must lie in [0, 1), got {s.failure_limit}")
    if s.screen_trajectories < 2:
        raise SettingError("screen_trajectories", "must be at least 2")


POLICY = (
    "Sobol design over the full prior box (SALib's Saltelli design; non-uniform priors mapped through "
    "their inverse CDF). A Saltelli design cannot drop rows, so the plausibility filter is NOT applied: "
    "indices of every risk metric are conditional on the whole prior, including parameter points whose "
    "baseline would be judged implausible today. The indicator 'baseline/plausible/all' shows which "
    "priors make today's ecosystem implausible. Each point is the deterministic skeleton (environmental "
    "noise off); each point draws its own chance events from a stream named by its coordinates, so an "
    "event probability shows its influence like any other parameter. Base samples holding a numerically failed "
    "point are dropped whole; an output with more failed points than the declared limit is refused. "
    "Rows marked 'plausible subset' are first-order indices from SALib's given-data RBD-FAST estimator "
    "on the plausible A and B points only (no total order there), for the quasi-extinction indicator and "
    "the paired change only."
)


def _conditional(screened_out: Sequence[str]) -> str:
    s = "full prior, plausibility not applied; noise off, chance events per design point"
    if screened_out:
        s += f"; screened-out parameters held at prior median ({', '.join(screened_out)})"
    return s


GIVEN_DATA_METRICS = ("quasi_extinct", "mean_change")
CONDITIONAL_PLAUSIBLE = "plausible subset (given-data RBD-FAST, first order only); noise off, chance events per design point"


def given_data_first_order(X: np.ndarray, y: np.ndarray, names: Sequence[str], seed: int) -> tuple[np.ndarray, np.ndarray]:
    """First-order indices from given data by random balance designs (Tarantola et al. 2006; Plischke 2010; SALib).

    Returns
    -------
    S1, S1_conf : ndarray (D,)
    """
    from SALib.analyze import rbd_fast

    ok = np.isfinite(y)
    X, y = X[ok], y[ok]
    D = X.shape[1]
    if y.size < 64 or np.ptp(y) == 0:
        return np.full(D, np.nan), np.full(D, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        S = rbd_fast.analyze(_problem(names), X, y, seed=_int_seed(seed, 4))
    return np.asarray(S["S1"], float), np.asarray(S["S1_conf"], float)


@dataclass(frozen=True)
class StageResult:
    """Tables and settings of the sensitivity stage (written by the CLI)."""

    indices: pd.DataFrame
    second_order: pd.DataFrame
    ranking: pd.DataFrame
    convergence: pd.DataFrame
    info: dict
    refused: list


INDEX_COLUMNS = ["option", "metric", "species", "parameter", "S1", "S1_conf", "ST", "ST_conf", "conditional_on", "N"]
S2_COLUMNS = ["option", "metric", "species", "parameter_i", "parameter_j", "S2", "S2_conf"]
RANK_COLUMNS = ["option", "metric", "species", "rank", "parameter", "ST", "ST_conf", "S1", "interaction"]
CONV_COLUMNS = ["option", "metric", "species", "max_shift", "max_ci_width", "tolerance", "converged"]


def screen(case: Case, settings: Settings, progress=None, executor=None, store=None) -> dict:
    """Morris screening of every uncertain parameter over every output; which to keep."""
    names = [p.name for p in case.uncertain]
    D = len(names)
    design = morris_design(names, settings.screen_trajectories, settings.seed)
    model = FoodWebModel(case, settings.seed, np.arange(D), np.full(D, 0.5), progress=progress,
                          executor=executor, store=store)
    Y = model(design.unit)
    score = np.zeros(D)
    for k in range(Y.shape[1]):
        mu = morris_effects(design, Y[:, k], seed=settings.seed)["mu_star"]
        if mu.max() > 0:
            score = np.maximum(score, mu / mu.max())
    keep = score >= settings.screen_keep
    if keep.sum() < 2:  # Sobol needs at least two factors; keep the two strongest
        keep[np.argsort(score)[-2:]] = True
    return {"method": "Morris elementary effects (SALib)", "trajectories": settings.screen_trajectories,
            "levels": design.levels, "runs": design.runs, "keep_share": settings.screen_keep,
            "score": dict(zip(names, score.round(4).tolist())),
            "kept": [n for n, k in zip(names, keep) if k], "dropped": [n for n, k in zip(names, keep) if not k],
            "failures": model.failures, "seconds": round(model.seconds, 3)}


def sensitivity_stage(case: Case, settings: Settings, progress=None, executor=None, store=None) -> StageResult:
    """Sobol indices of every per-point risk metric, per option, with ranking and convergence."""
    import time

    check_settings(settings)
    all_names = [p.name for p in case.uncertain]
    if len(all_names) < 2:
        raise CaseError(case.path, "parameters", "sensitivity analysis needs at least two uncertain parameters")
    do_screen = settings.screen if settings.screen is not None else len(all_names) > SCREEN_ABOVE
    screening = {"method": "none", "reason": f"{len(all_names)} uncertain parameters (screening above {SCREEN_ABOVE})"}
    names = all_names
    if do_screen:
        screening = screen(case, settings, progress, executor, store)
        names = screening["kept"]
    varied = np.array([all_names.index(n) for n in names])
    model = FoodWebModel(case, settings.seed, varied, np.full(len(all_names), 0.5), progress=progress,
                         executor=executor, store=store)
    t0 = time.perf_counter()
    study = sobol_study(model, names, settings.base_samples, second_order=settings.second_order,
                        seed=settings.seed, confidence=settings.confidence, resamples=settings.resamples,
                        tolerance=settings.tolerance, failure_limit=settings.failure_limit)
    total = time.perf_counter() - t0
    analysis_seconds = total - model.seconds
    labels = output_labels(case)
    cond = _conditional(screening.get("dropped", []))
    N = settings.base_samples
    idx_rows, s2_rows, rank_rows, conv_rows, refused, constant = [], [], [], [], [], []
    for (opt, metric, sp), ind, cv in zip(labels, study.indices, study.convergence):
        conv_rows.append(dict(option=opt, metric=metric, species=sp, **cv))
        if ind.status == "refused":
            refused.append(dict(option=opt, metric=metric, species=sp, message=ind.message))
            continue
        if ind.status == "constant":
            constant.append(f"{opt}/{metric}/{sp}")
            continue
        for j, p in enumerate(names):
            idx_rows.append(dict(option=opt, metric=metric, species=sp, parameter=p, S1=ind.S1[j],
                                 S1_conf=ind.S1_conf[j], ST=ind.ST[j], ST_conf=ind.ST_conf[j],
                                 conditional_on=cond, N=N))
        order = np.argsort(-ind.ST, kind="stable")
        for r, j in enumerate(order, start=1):
            rank_rows.append(dict(option=opt, metric=metric, species=sp, rank=r, parameter=names[j], ST=ind.ST[j],
                                  ST_conf=ind.ST_conf[j], S1=ind.S1[j], interaction=ind.ST[j] - ind.S1[j]))
        if ind.S2 is not None:
            for i in range(len(names)):
                for j in range(i + 1, len(names)):
                    s2_rows.append(dict(option=opt, metric=metric, species=sp, parameter_i=names[i],
                                        parameter_j=names[j], S2=ind.S2[i, j], S2_conf=ind.S2_conf[i, j]))
    # given-data first-order indices on the plausible A and B points (i.i.d. draws from the prior)
    t1 = time.perf_counter()
    rows = study.design.base_rows()
    kept = study.outputs[rows, 0] == 1.0
    Xk = study.design.unit[rows][kept]
    for k, (opt, metric, sp) in enumerate(labels):
        # the given-data estimator costs ~0.3 s per output at N=1024, so only the headline risks get it
        if not settings.given_data or metric not in GIVEN_DATA_METRICS or study.indices[k].status != "ok":
            continue
        s1, c1 = given_data_first_order(Xk, study.outputs[rows, k][kept], names, settings.seed)
        if not np.isfinite(s1).any():
            continue
        for j, p in enumerate(names):
            idx_rows.append(dict(option=opt, metric=metric, species=sp, parameter=p, S1=s1[j], S1_conf=c1[j],
                                 ST=np.nan, ST_conf=np.nan, conditional_on=CONDITIONAL_PLAUSIBLE, N=int(kept.sum())))
    analysis_seconds += time.perf_counter() - t1
    runs = study.design.runs
    info = {
        "N": N, "D": len(names), "second_order": settings.second_order, "runs": runs,
        "failures": {"points_failed_by_option": model.failures, "design_points": runs,
                     "refused_outputs": len(refused)},
        "failure_limit": settings.failure_limit,
        "policy": POLICY,
        "method": "Sobol indices: SALib sobol.sample (scrambled Sobol', Saltelli cross-sampling) and sobol.analyze "
                  "(Saltelli et al. 2010 first/total order, Saltelli 2002 second order), bootstrap CIs "
                  f"({settings.resamples} resamples, {settings.confidence:.0%}); convergence: indices at N vs the "
                  "first N/2 base samples of the same design",
        "screening": screening,
        "parameters": names,
        "tolerance": settings.tolerance,
        "confidence": settings.confidence,
        "seed": settings.seed,
        "conditional_on": cond,
        "plausible_share": float(np.nanmean(study.outputs[rows, 0])),
        "plausible_points": int(kept.sum()),
        "constant_outputs": constant,
        "refused": refused,
        "not_converged": int(sum(not c["converged"] for c in study.convergence)),
        "metrics": METRIC_TEXT,
        "horizon": case.horizon,
        "seconds": {"simulation": round(model.seconds, 3), "analysis": round(analysis_seconds, 3)},
    }
    return StageResult(pd.DataFrame(idx_rows, columns=INDEX_COLUMNS), pd.DataFrame(s2_rows, columns=S2_COLUMNS),
                       pd.DataFrame(rank_rows, columns=RANK_COLUMNS), pd.DataFrame(conv_rows, columns=CONV_COLUMNS),
                       info, refused)


def summary_lines(res: StageResult, top: int = 3) -> list[str]:
    """Short text summary of the stage (the CLI prints it)."""
    info = res.info
    L = [f"sensitivity: {info['runs']} design points (N={info['N']}, D={info['D']}), "
         f"{info['plausible_share']:.0%} of them plausible today; indices conditional on: {info['conditional_on']}"]
    fails = info["failures"]["points_failed_by_option"]
    if any(fails.values()):
        L.append("  numerically failed design points: " + ", ".join(f"{k} {v}" for k, v in fails.items()))
    for r in res.refused:
        L.append(f"  REFUSED {r['option']}/{r['metric']}/{r['species']}: {r['message']}")
    nc = info["not_converged"]
    L.append(f"  {nc} of {len(res.convergence)} outputs NOT converged (CI width or N/2 shift > {info['tolerance']:g})"
             if nc else "  all outputs converged within the tolerance")
    rk = res.ranking
    for opt, metric, sp in [("baseline", "plausible", "all")]:
        sel = rk[(rk.option == opt) & (rk.metric == metric) & (rk.species == sp)].head(top)
        cv = res.convergence
        ok = cv[(cv.option == opt) & (cv.metric == metric) & (cv.species == sp)].converged.all()
        if len(sel):
            L.append("  what makes today's web implausible: "
                     + ", ".join(f"{p} (ST {st:.2f})" for p, st in zip(sel.parameter, sel.ST))
                     + ("" if ok else " [NOT converged: indicative only]"))
    return L
