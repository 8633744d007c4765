"""Which study to fund: the expected value of sample information (EVSI) of each candidate study.

A candidate study (:class:`impact.case.studies.Study`) yields data whose distribution depends on a
member's parameters or on its state today. Its value to the choice among doing nothing and every
option is, with ``D`` the study's data and ``NB[i, d]`` a member's realised net benefit,

    ``EVSI = E_D[max_d E(NB_d | D)] − max_d E(NB_d)``

(Raiffa & Schlaifer 1961; Ades, Lu & Claxton 2004, Medical Decision Making 24:207–227). It is
estimated on the existing ensemble by regression (Strong, Brennan & Oakley 2015, Medical Decision
Making 35:570–583): every member's study data are simulated from its own parameters and state through
the declared observation model, summarised in a low-dimensional statistic ``T(D)`` (per measured
quantity, the log of the mean count, or the mean log index: sufficient for the Poisson and the
lognormal, nearly so for the negative binomial), and each decision's net benefit is regressed on
``T``. The regression, the cross-fitting that keeps the maximum from picking up fitted noise, the
clipping at 0 and the bootstrap are those of the EVPPI (:mod:`impact.decision.voi`, whose public functions are
used as they are); the resamples are the very ones of ``sensitivity/information.csv`` (the same seed
and purpose), so each study's ceiling is the EVPPI printed there.

Bounds: data on φ can at most tell φ exactly, so ``EVSI ≤ EVPPI(φ) ≤ EVPI``; the estimate is capped at
the EVPPI of what the study measures (the parameter or group; every parameter, i.e. the EVPI, for a
survey of a species, whose abundance today depends on all of them) resample by resample, as the
EVPPI is capped at the EVPI. A value whose bootstrap lower limit is 0 is not distinguishable from no
value at all.

Study data are drawn from each member's own stream ``SeedSequence(seed, spawn_key=(draw,
PURPOSE_STUDIES, key))``, ``key`` the CRC-32 of the study's name: a member's data do not depend on
which other members are kept, on their order, or on the other studies declared.

Valued in money or a common unit only where the case declares it (``[outcome_values]``): the expected
net benefit of sampling is then ``EVSI × value of a certain good outcome − cost``. Otherwise the EVSI
(in probability units) and the cost stand side by side, unconverted.
"""

from __future__ import annotations

import zlib

import numpy as np
import pandas as pd
from numpy.random.bit_generator import ISeedSequence

from impact.risk.effects import BASELINE, good_outcome
from impact.model import resolve
from impact.decision.voi import Estimate, choice_sets, estimates, member_weights, penalised_design, rule_gains
from impact.store.results import VALUED_TOGETHER

PURPOSE_STUDIES = 13  # spawn-key purpose of the study-data streams


def _stream(seed: int, draw: int, key: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(int(draw), PURPOSE_STUDIES, key))))


class _Words(ISeedSequence):
    """A seed sequence whose state words are already known (:func:`stream_words`): hashing them is the cost."""

    def __init__(self, words: np.ndarray):
        self.words = words

    def generate_state(self, n_words, dtype=np.uint32):
        if n_words != 4 or np.dtype(dtype) != np.uint64:
            raise ValueError("holds PCG64's four 64-bit seed words only")
        return self.words


# numpy's SeedSequence constants (numpy/random/bit_generator.pyx; O'Neill's seed_seq_fe design)
_INIT_A, _MULT_A, _INIT_B, _MULT_B = 0x43B0D7E5, 0x931E8875, 0x8B51F9DD, 0x58F38DED
_MIX_L, _MIX_R, _POOL = 0xCA01F9DD, 0x4973F715, 4
_U32 = 0xFFFFFFFF


def _uint32_words(n: int) -> list[int]:
    out = [n & _U32]
    while n > _U32:
        n >>= 32
        out.append(n & _U32)
    return out


def stream_words(seed: int, draws: np.ndarray, key: int) -> np.ndarray | None:
    """PCG64's seed words (M, 4) of every member's stream ``SeedSequence(seed, spawn_key=(draw, PURPOSE_STUDIES,
    key))``, computed for all members at once as numpy's SeedSequence computes them one at a time (the same
    words: tested against it); None when a draw index needs more than one 32-bit word."""
    draws = np.asarray(draws)
    if draws.size and (draws.min() < 0 or draws.max() > _U32):
        return None
    run = _uint32_words(int(seed))
    run += [0] * max(0, _POOL - len(run))
    entropy = [np.full(draws.size, w, np.uint64) for w in run]
    entropy += [draws.astype(np.uint64)] + [np.full(draws.size, w, np.uint64) for w in
                                            _uint32_words(PURPOSE_STUDIES) + _uint32_words(int(key))]
    h = [_INIT_A]

    def hashmix(v):  # (uint64 arrays holding uint32 values: products wrap by masking)
        v = v ^ h[0]
        h[0] = (h[0] * _MULT_A) & _U32
        v = (v * h[0]) & _U32
        return v ^ (v >> 16)

    def mix(x, y):
        r = (_MIX_L * x - _MIX_R * y) & _U32
        return r ^ (r >> 16)

    pool = [hashmix(entropy[i]) for i in range(_POOL)]
    for src in range(_POOL):
        for dst in range(_POOL):
            if src != dst:
                pool[dst] = mix(pool[dst], hashmix(pool[src]))
    for src in range(_POOL, len(entropy)):
        for dst in range(_POOL):
            pool[dst] = mix(pool[dst], hashmix(entropy[src]))
    hb, state = _INIT_B, []
    for i in range(8):
        v = pool[i % _POOL] ^ hb
        hb = (hb * _MULT_B) & _U32
        v = (v * hb) & _U32
        state.append(v ^ (v >> 16))
    # little-endian pairs of 32-bit words, as SeedSequence.generate_state(4, np.uint64) makes them
    return np.stack([state[2 * j] | (state[2 * j + 1] << np.uint64(32)) for j in range(4)], axis=1)


def study_key(name: str) -> int:
    """The study's word in its members' spawn keys: the CRC-32 of its name (independent of declaration order)."""
    return zlib.crc32(name.encode("utf-8"))


def simulate_summary(truth: np.ndarray, error: str, samples: int, detection: np.ndarray, scale: np.ndarray,
                     dispersion: np.ndarray | None, log_sd: np.ndarray | None, draws: np.ndarray, seed: int,
                     key: int) -> np.ndarray:
    """Each member's summary of ``samples`` simulated observations of each measured quantity.

    Parameters
    ----------
    truth : ndarray (M, k)
        The measured quantities (abundance today, or parameter values), >= 0 (> 0 for the lognormal).
    error : str
        ``poisson`` (mean ``detection × scale × truth``), ``negative-binomial`` (same mean, size
        ``dispersion``) or ``lognormal`` (median ``scale × truth``, log-SD ``log_sd``).
    detection, scale, dispersion, log_sd : ndarray (M,)
        Per member (``dispersion``/``log_sd`` None when the model has none).
    draws : ndarray (M,) int
        Members' draw indices (their identity in the random path).

    Returns
    -------
    ndarray (M, k)
        ``log(mean count + 0.5/samples)`` for counts, the mean log value for the lognormal; NaN where
        the truth is not finite (a failed member).
    """
    return simulate_summaries(truth, error, [samples], detection, scale, dispersion, log_sd, draws, seed, key)[samples]


def simulate_summaries(truth: np.ndarray, error: str, sizes, detection: np.ndarray, scale: np.ndarray,
                       dispersion: np.ndarray | None, log_sd: np.ndarray | None, draws: np.ndarray, seed: int,
                       key: int) -> dict[int, np.ndarray]:
    """:func:`simulate_summary` at each sample size of ``sizes``: size -> (M, k), the same numbers as one call each.

    A member's data at every size start its one stream afresh, so the stream is made once per member and
    restarted from its saved state. Where a size's draws are the first draws of the largest size's, they
    are read from one draw of the largest: standard normals (the lognormal, any k), and Poisson counts of a
    single measured quantity. The negative binomial draws its gamma means before its counts, so each size
    draws anew.
    """
    truth = np.asarray(truth, float)
    M, k = truth.shape
    sizes = sorted({int(n) for n in sizes})
    top = sizes[-1]
    out = {n: np.full((M, k), np.nan) for n in sizes}
    ok = np.isfinite(truth).all(axis=1)
    prefix = error == "lognormal" or (error == "poisson" and k == 1)
    shared = np.full((M, k * top), np.nan) if prefix else None  # each member's draws at the largest size
    nbinom = error == "negative-binomial"
    counts = {} if prefix else {n: np.zeros((M, k, n)) for n in sizes}
    words = stream_words(seed, draws, key)  # every member's seed words at once (hashing them one by one costs most)
    for i in np.flatnonzero(ok):
        rng = _stream(seed, draws[i], key) if words is None else np.random.Generator(np.random.PCG64(_Words(words[i])))
        if error == "lognormal":
            shared[i] = rng.standard_normal(k * top)
            continue
        mean = detection[i] * scale[i] * np.maximum(truth[i], 0.0)[:, None]
        if prefix:
            shared[i] = rng.poisson(np.broadcast_to(mean, (k, top))).ravel()
            continue
        start = rng.bit_generator.state
        for n in sizes:
            rng.bit_generator.state = start
            if nbinom and k == 1:  # the draws a (1, n) array of gamma scales would take (a scalar scale costs less)
                mu = rng.gamma(dispersion[i], float(mean[0, 0] / dispersion[i]), size=(1, n))
            elif nbinom:  # row by row, likewise
                mu = np.stack([rng.gamma(dispersion[i], float(m), size=n) for m in mean[:, 0] / dispersion[i]])
            else:
                mu = np.broadcast_to(mean, (k, n))
            counts[n][i] = rng.poisson(mu)
    for n in counts:
        out[n][ok] = np.log(counts[n][ok].mean(axis=2) + 0.5 / n)
    if prefix:
        for n in sizes:
            # (M, k, n) rows laid out as one call of size (k, n) lays them out, so each mean sums the same numbers
            means = shared[:, :k * n].reshape(M, k, n).mean(axis=2)
            if error == "lognormal":
                out[n][ok] = np.log(scale[ok, None] * truth[ok]) + log_sd[ok, None] * means[ok]
            else:
                out[n][ok] = np.log(means[ok] + 0.5 / n)
    return out


def study_summaries(case, study, sizes, values: dict, today: np.ndarray, draws: np.ndarray,
                    seed: int) -> dict[int, np.ndarray]:
    """Summary (M, k) of ``study``'s simulated data for every member at each sample size of ``sizes``
    (:func:`simulate_summaries`). ``values`` are the members' parameter values (M,) by name, ``today`` their
    state today (M, n_state)."""
    M = len(draws)
    if study.measures == "species":
        truth = today[:, [case.species_names.index(study.target)]]
    else:
        truth = np.column_stack([values[p] for p in study.parameters])
    opt = {n: (None if getattr(study, n) is None else resolve(getattr(study, n), values, M))
           for n in ("detection", "scale", "dispersion", "log_sd")}
    return simulate_summaries(truth, study.error, sizes, draws=draws, seed=seed, key=study_key(study.name), **opt)


def study_summary(case, study, values: dict, today: np.ndarray, draws: np.ndarray, seed: int) -> np.ndarray:
    """Summary (M, k) of ``study``'s simulated data for every member (:func:`simulate_summary`) at its declared size."""
    return study_summaries(case, study, [study.samples], values, today, draws, seed)[study.samples]


def sample_values_many(nbs: list[np.ndarray], X: np.ndarray, names: list[str],
                       studies: dict[str, tuple[np.ndarray, list[str] | None]], *, resamples: int = 200,
                       confidence: float = 0.95, seed: int = 0) -> list[dict[str, tuple[Estimate, Estimate]]]:
    """EVSI of each study, and its ceiling, for several choice sets on the same members.

    Parameters
    ----------
    nbs : list of ndarray (M, D_j)
        Realised net benefits of each choice set (an objective's good outcome, or a valued sum).
    X : ndarray (M, P)
        The members' parameter values, columns in the order of ``names``.
    studies : dict of str -> (ndarray (M, k), list of str or None)
        Each study's data summary and the parameters it measures (None: all, the ceiling is the EVPI).

    Returns
    -------
    list (one per choice set) of dict str -> (EVSI, ceiling)
        Values and limits clipped at 0; the EVSI capped at its ceiling (the EVPPI of what the study
        measures, itself capped at the EVPI) resample by resample.
    """
    nb, splits = choice_sets(nbs)
    X = np.asarray(X, float).reshape(nb.shape[0], -1)
    M = nb.shape[0]
    # the resamples of impact.decision.voi.information_values_many: the same seed, hence the same rows
    W = member_weights(M, resamples, seed)
    top = np.maximum(rule_gains(nb, *penalised_design(X, interactions=False), W, splits), 0.0)
    col = {n: j for j, n in enumerate(names)}
    ceilings: dict[tuple | None, np.ndarray] = {None: top}
    values, caps = {}, {}
    for key, (Z, informs) in studies.items():
        k = None if informs is None else tuple(informs)
        if k not in ceilings:
            gains = rule_gains(nb, *penalised_design(X[:, [col[m] for m in k]]), W, splits)
            ceilings[k] = np.minimum(np.maximum(gains, 0.0), top)
        Z = np.asarray(Z, float).reshape(M, -1)
        values[key] = np.minimum(np.maximum(rule_gains(nb, *penalised_design(Z), W, splits), 0.0), ceilings[k])
        caps[key] = k
    # every estimate's limits in one call per choice set (the numbers of one call each)
    ceiling_keys = list(ceilings)
    out: list[dict] = []
    for j in range(len(splits)):
        evsi = estimates(np.stack([values[key][j] for key in values]), confidence) if values else []
        cap = dict(zip(ceiling_keys, estimates(np.stack([ceilings[k][j] for k in ceiling_keys]), confidence)))
        out.append({key: (e, cap[caps[key]]) for key, e in zip(values, evsi)})
    return out


STUDY_COLUMNS = ("study", "measures", "target", "error", "samples", "objective", "evsi", "low", "high",
                 "distinguishable", "ceiling", "ceiling_low", "ceiling_high", "ceiling_of", "cost", "cost_unit",
                 "value_scale", "enbs", "enbs_low", "enbs_high", "worth_cost", "interval", "level", "n", "unit")
PROBABILITY_UNIT = "probability of a good outcome"
RESAMPLES = 100  # as the EVPPI of sensitivity/information.csv (impact.decision.hinges.RESAMPLES)


def worth_cost(enbs_low: float, enbs_high: float) -> str:
    """``yes`` when the expected net benefit of sampling is above 0 at its lower limit, ``no`` when below 0
    at its upper limit, else ``undetermined`` (NaN limits: ``no value scale``)."""
    if not (np.isfinite(enbs_low) and np.isfinite(enbs_high)):
        return "no value scale"
    return "yes" if enbs_low > 0 else ("no" if enbs_high < 0 else "undetermined")


def _choice_sets(case, summaries: dict, choices: list[str]) -> list[tuple[str, np.ndarray, float | None, str]]:
    """(objective, net benefits (M, D), value scale, unit) of each objective, and the valued sum where declared."""
    sets = []
    ov = case.outcome_values
    for obj in case.objectives:
        nb = np.column_stack([good_outcome(case, obj, summaries[c]) for c in choices])
        sets.append((obj.name, nb, None if ov is None else ov.of(obj.name), PROBABILITY_UNIT))
    if ov is not None and ov.values:
        valued = [(o, ov.of(o.name)) for o in case.objectives if ov.of(o.name) is not None]
        total = sum(v * np.column_stack([good_outcome(case, o, summaries[c]) for c in choices]) for o, v in valued)
        sets.append((VALUED_TOGETHER, total, 1.0, ov.unit))
    return sets


SIZE_FACTORS = (0.25, 0.5, 1.0, 2.0, 4.0)  # sample sizes tried around the declared one, for "how large?"
SIZE_COLUMNS = ("study", "objective", "samples", "declared", "evsi", "low", "high", "ceiling", "unit", "n")


def _valued(case, X: np.ndarray, names: list[str], sets: list, data: dict, informs: dict, seed: int) -> list[dict]:
    """:func:`sample_values_many` of the studies ``data`` (key -> (M, k)) under each choice set of ``sets``, each
    on its members with finite net benefits and data; choice sets on the same members share one call (the
    same numbers as one call each)."""
    oks = [np.isfinite(nb).all(axis=1) & np.all([np.isfinite(z).all(axis=1) for z in data.values()], axis=0)
           for _, nb, _, _ in sets]
    est: dict[int, dict] = {}
    for mask in {ok.tobytes(): ok for ok in oks}.values():
        same = [i for i, ok in enumerate(oks) if np.array_equal(ok, mask)]
        many = sample_values_many([sets[i][1][mask] for i in same], X[mask], names,
                                  {k: (z[mask], informs[k]) for k, z in data.items()},
                                  resamples=RESAMPLES, confidence=case.risk.confidence, seed=seed)
        est.update(zip(same, many))
    return [est[i] for i in range(len(sets))]


def study_tables(case, values: dict, today: np.ndarray, draws: np.ndarray, summaries: dict,
                 seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """:func:`studies_table` and :func:`study_sizes_table` together (the same numbers), computing what they
    share once: each study's data at every size, the declared size's value, and the choice's EVPI and
    ceilings."""
    choices = [BASELINE, *(o.name for o in case.options)]
    names = [p.name for p in case.uncertain]
    X = np.column_stack([values[n] for n in names])
    data, sizes = {}, []
    for s in case.studies:
        ns = sorted({max(1, int(round(s.samples * f))) for f in SIZE_FACTORS})  # the declared size among them (1.0)
        data.update({(s.name, n): z for n, z in study_summaries(case, s, ns, values, today, draws, seed).items()})
        sizes += [(s, n) for n in ns]
    informs = {(s.name, n): (list(s.parameters) if s.parameters else None) for s, n in sizes}
    declared = {(s.name, s.samples): data[(s.name, s.samples)] for s in case.studies}
    sets = _choice_sets(case, summaries, choices)
    oks = [np.isfinite(nb).all(axis=1) for _, nb, _, _ in sets]
    ok_all = [ok & np.all([np.isfinite(z).all(axis=1) for z in data.values()], axis=0) for ok in oks]
    ok_declared = [ok & np.all([np.isfinite(z).all(axis=1) for z in declared.values()], axis=0) for ok in oks]
    by_size = _valued(case, X, names, sets, data, informs, seed)
    # the declared sizes are valued on their own members, which differ from those of every size only where
    # another size's data failed (never, as a member's data fail by its truth alone)
    by_study = (by_size if all(np.array_equal(a, b) for a, b in zip(ok_all, ok_declared))
                else _valued(case, X, names, sets, declared, {k: informs[k] for k in declared}, seed))
    rows = []
    for (objective, _, scale, unit), est, ok in zip(sets, by_study, ok_declared):
        for s in case.studies:
            e, cap = est[(s.name, s.samples)]
            enbs = [np.nan] * 3 if scale is None else [scale * x - s.cost for x in (e.value, e.low, e.high)]
            rows.append(dict(study=s.name, measures=s.measures, target=s.target, error=s.error, samples=s.samples,
                             objective=objective, evsi=e.value, low=e.low, high=e.high, distinguishable=bool(e.low > 0),
                             ceiling=cap.value, ceiling_low=cap.low, ceiling_high=cap.high,
                             ceiling_of="all parameters" if informs[(s.name, s.samples)] is None else s.target,
                             cost=s.cost, cost_unit=s.cost_unit, value_scale=np.nan if scale is None else scale,
                             enbs=enbs[0], enbs_low=enbs[1], enbs_high=enbs[2], worth_cost=worth_cost(enbs[1], enbs[2]),
                             interval="bootstrap_percentile", level=case.risk.confidence, n=int(ok.sum()), unit=unit))
    size_rows = []
    for (objective, _, _, unit), est, ok in zip(sets, by_size, ok_all):
        for s, n in sizes:
            e, cap = est[(s.name, n)]
            size_rows.append(dict(study=s.name, objective=objective, samples=n, declared=bool(n == s.samples),
                                  evsi=e.value, low=e.low, high=e.high, ceiling=cap.value, unit=unit, n=int(ok.sum())))
    return pd.DataFrame(rows, columns=list(STUDY_COLUMNS)), pd.DataFrame(size_rows, columns=list(SIZE_COLUMNS))


def studies_table(case, values: dict, today: np.ndarray, draws: np.ndarray, summaries: dict, seed: int) -> pd.DataFrame:
    """EVSI of every candidate study under every objective (and the valued objectives together), with costs.

    Parameters
    ----------
    values : dict of str -> ndarray (M,)
        Kept members' parameter values.
    today, draws : ndarray (M, n_state), (M,)
        Their state today and draw indices.
    summaries : dict of str -> run summary
        Doing nothing (``baseline``) and every option, on the same members; an objective's net benefit
        in a member is its good outcome (:func:`impact.risk.effects.good_outcome`), as in the EVPPI.
    """
    return study_tables(case, values, today, draws, summaries, seed)[0]


def study_sizes_table(case, values: dict, today: np.ndarray, draws: np.ndarray, summaries: dict,
                      seed: int) -> pd.DataFrame:
    """EVSI of every study at a quarter, half, once, twice and four times its declared sample size.

    The same members, resamples and ceilings as :func:`studies_table`; a member's data at every size come from
    its one stream for the study (the smaller samples are the first draws of the larger ones for a single
    measured quantity), so the curve's steps are not blurred by fresh noise at each size.
    """
    return study_tables(case, values, today, draws, summaries, seed)[1]
