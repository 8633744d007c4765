"""Regime verdicts from evidence gathered over sub-windows (pure numpy; no integration here).

The diagnosed window is cut into ``k`` equal sub-windows, each preceded by a short alignment run
of the tangent vector (so every sub-window's finite-time exponent starts from a vector already
pointing along the most expanding direction). Per member and sub-window the diagnosis keeps
the finite-time Lyapunov exponent λ_j, the minimum and maximum of every state, and the Poincaré
section points (successive maxima of one state). The verdict reads:

* ``λ`` and its uncertainty: the mean of the λ_j and its standard error from their spread
  (batch means; e.g. Flyvbjerg & Petersen 1989, J. Chem. Phys. 91:461), inflated for the
  correlation between consecutive sub-windows by the AR(1) factor (1 + ρ)/(1 − ρ), ρ the lag-1
  autocorrelation of the λ_j plus its white-noise bias 1/k, clipped to [0, 0.8] (variance of a
  mean under AR(1) correlation, e.g. Wilks 2011, Statistical Methods in the Atmospheric Sciences,
  3rd ed., Sec. 5.2.4; from memory), and k − 1 degrees of freedom. λ is *negative* when the
  Student-t interval at ``confidence`` lies below zero, *positive* when it lies above the flow
  allowance (see :class:`Rules`);
* stability: Re μ₁ of the Jacobian at the equilibrium Newton's method finds from the window's
  end (or its time-mean), where one is found;
* the envelope: the oscillation amplitude (max − min) of the most oscillating state in each
  sub-window; a least-squares line through its logarithm gives the decay (or growth) rate, which
  counts when its interval excludes zero *and* it changes the amplitude by more than ``env_tol``
  over the window;
* the period: the smallest shift k ≤ ``max_period`` under which the section repeats over the
  second half of the sub-windows (pairs compared within a sub-window), two section values
  counting as equal when they differ by less than ``period_tol`` times the section variable's
  amplitude (max − min), not its size.

Rules (in this order):

* ``extinction``    a watched species stays below its quasi-extinction level over the window
  (where the diagnosis does not go on with the remaining web, see
  :func:`impact.dynamics.diagnose.diagnose_web`);
* ``equilibrium``   at rest (every relative amplitude below ``eq_tol`` in the last sub-window) or
  the envelope decaying, *and* the equilibrium stable: Re μ₁ < 0 where an equilibrium was
  found, else λ negative; and λ not positive. An unstable equilibrium is never called one (at
  rest near it is ``undetermined``);
* ``chaotic``       λ positive (beyond the flow allowance, see :class:`Rules`) and the section
  does not repeat;
* ``cycle``         λ not distinguishable from zero, a steady envelope and a repeating section;
* ``aperiodic``     λ not distinguishable from zero, a steady envelope, enough section points and
  no period up to ``max_period`` (quasi-periodic, or chaos too weak to resolve);
* ``undetermined``  anything else, with the reason (see :class:`Reason`).

A verdict must survive doubling the window: the rules are applied to the first half of the
sub-windows and to all of them; a member whose verdict (or period) differs is ``undetermined``
with reason ``window-doubling``. A member whose own time scales asked for more than the
longest window allowed is not called ``aperiodic`` (the absence of a period needs the whole
window): it is ``undetermined`` with reason ``window-cap``. Thresholds and confidence are in
:class:`Rules`.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

import numpy as np
from scipy import stats

REGIMES = ("equilibrium", "cycle", "aperiodic", "chaotic", "extinction", "undetermined")


class Reason(enum.Enum):
    """Why a verdict is ``undetermined`` (value: the code written to the tables)."""

    SLOW_DECAY = "slow-decay"
    NOT_DECAYING = "lambda-negative-envelope-steady"
    DRIFT = "envelope-drifting"
    PERIOD_AND_CHAOS = "period-with-positive-lambda"
    FEW_SECTION_POINTS = "too-few-section-points"
    WINDOW_DOUBLING = "window-doubling"
    UNSTABLE_REST = "at-rest-near-unstable-equilibrium"
    SETTLING_POSITIVE = "lambda-positive-while-settling"
    WINDOW_CAP = "window-cap"

    @property
    def text(self) -> str:
        return REASON_TEXT[self]


REASON_TEXT = {
    Reason.SLOW_DECAY: "the oscillation decays but λ is not distinguishable from zero: a slow spiral or a long "
                       "transient; a longer window would decide",
    Reason.NOT_DECAYING: "λ is negative but the oscillation envelope does not decay",
    Reason.DRIFT: "the envelope is still growing or shrinking while λ is near zero: a long transient",
    Reason.PERIOD_AND_CHAOS: "the section repeats but λ is positive",
    Reason.FEW_SECTION_POINTS: "too few oscillations in a sub-window to look for a period",
    Reason.WINDOW_DOUBLING: "the verdict changed when the window was doubled",
    Reason.UNSTABLE_REST: "at rest near an equilibrium whose Jacobian has an eigenvalue with positive real part: "
                          "a longer window would show the departure",
    Reason.SETTLING_POSITIVE: "the trajectory settles toward a stable equilibrium but λ is positive: still in a "
                              "transient; a longer window would decide",
    Reason.WINDOW_CAP: "the member's own time scales ask for a longer window than allowed (max_window or "
                       "max_window_rates), and the verdict found needs the whole window",
}


@dataclass(frozen=True)
class Rules:
    """Tolerances of the verdict (dimensionless).

    Attributes
    ----------
    eq_tol : float
        Relative amplitude (max − min)/(|mean| + floor) below which every state counts as at rest.
    period_tol : float
        Two section values are equal when they differ by less than this fraction of the section
        variable's amplitude.
    max_period : int
        Longest period looked for; every period up to it must be testable (see
        :func:`detect_period_pieces`) to call a member aperiodic.
    env_tol : float
        Smallest relative change of the envelope over the window that counts as decay or growth.
    confidence : float
        Two-sided confidence of the intervals on λ and on the envelope rate.
    flow_allowance : float
        Along a cycle the tangent vector follows the flow, whose speed varies with the phase, so an
        exponent over time T is off by up to ln(fastest/slowest speed)/T. The sub-windows start at
        staggered phases, so these terms mostly average out; what may remain is that of the whole
        window W: λ counts as positive only beyond ``flow_allowance``/W on top of its interval
        (ln 10: speeds within a factor 10; common practice, no source).
    """

    eq_tol: float = 1e-3
    period_tol: float = 1e-3
    max_period: int = 16
    env_tol: float = 0.05
    confidence: float = 0.99
    flow_allowance: float = float(np.log(10.0))


@dataclass(frozen=True)
class Evidence:
    """What the diagnosis kept per member and sub-window.

    Attributes
    ----------
    lyap : ndarray (M, k)
        Finite-time Lyapunov exponent of each sub-window (NaN for failed members).
    low, high : ndarray (M, k, n)
        Minimum and maximum of every state over each sub-window.
    mean : ndarray (M, n)
        Time-mean of every state over the whole window.
    floor : ndarray (n,)
        Added to |mean| before dividing (quasi-extinction levels), so a near-zero mean does not
        make a tiny wobble look large.
    sections : list of M lists of k ndarrays
        Section values per sub-window, in time order.
    section : ndarray (M,) int
        State column of the section.
    centre : ndarray (k,)
        Mid-time of each sub-window (for the envelope rate).
    extinct, failed : ndarray (M,) bool
    sub_window : float
        Length of one sub-window.
    leading : ndarray (M,), optional
        Re μ₁ at the equilibrium found from the window (NaN: none found; default: none).
    """

    lyap: np.ndarray
    low: np.ndarray
    high: np.ndarray
    mean: np.ndarray
    floor: np.ndarray
    sections: list
    section: np.ndarray
    centre: np.ndarray
    extinct: np.ndarray
    failed: np.ndarray
    sub_window: float
    leading: np.ndarray | None = None

    @property
    def k(self) -> int:
        return int(self.lyap.shape[1])

    def head(self, j: int) -> "Evidence":
        """The evidence of the first ``j`` sub-windows (the window before doubling)."""
        return Evidence(self.lyap[:, :j], self.low[:, :j], self.high[:, :j], self.mean, self.floor,
                        [s[:j] for s in self.sections], self.section, self.centre[:j], self.extinct, self.failed,
                        self.sub_window, self.leading)

    def amplitude(self) -> np.ndarray:
        """Oscillation amplitude (max − min over the whole window) of every state: (M, n)."""
        return self.high.max(axis=1) - self.low.min(axis=1)


@dataclass(frozen=True)
class Verdict:
    """Per-member verdict.

    Attributes
    ----------
    regime : ndarray (M,) of str
    period : ndarray (M,) int (0 where no period applies)
    lyapunov, lyapunov_se : ndarray (M,)
        Mean of the sub-window exponents and its standard error.
    envelope_rate : ndarray (M,)
        Slope of ln(amplitude) against time (1/time; negative: decaying); NaN when at rest.
    reason : ndarray (M,) of str
        :class:`Reason` code for ``undetermined`` members, "" otherwise.
    """

    regime: np.ndarray
    period: np.ndarray
    lyapunov: np.ndarray
    lyapunov_se: np.ndarray
    envelope_rate: np.ndarray
    reason: np.ndarray


def detect_period(values, scale: float, period_tol: float, max_period: int) -> int:
    """Smallest k ≤ max_period with s[i+k] ≈ s[i] over the last section points; 0 if none.

    Uses the last ``2·max_period`` points (all if fewer); a period k needs at least 2k points.
    Two values are equal when they differ by at most ``period_tol · scale``, with ``scale`` the
    oscillation's amplitude, so maxima converging to one level on a damped spiral do not repeat.
    """
    s = np.asarray(values, float)[-2 * max_period:]
    if s.size < 2 or not scale > 0:
        return 0
    for k in range(1, max_period + 1):
        if s.size < 2 * k:
            break
        if np.all(np.abs(s[k:] - s[:-k]) <= period_tol * scale):
            return k
    return 0


def t_quantile(confidence: float, dof) -> np.ndarray:
    """Two-sided Student-t quantile for ``dof`` degrees of freedom (inf where dof < 1)."""
    dof = np.asarray(dof, float)
    q = stats.t.ppf(0.5 + 0.5 * confidence, np.maximum(dof, 1.0))
    return np.where(dof >= 1, q, np.inf)


RHO_MAX = 0.8  # cap on the lag-1 autocorrelation (inflation ≤ 9; common practice, no source)


def lyapunov_estimate(lyap_sub: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean of the sub-window exponents, its standard error and degrees of freedom: (M,) each.

    Batch means with the AR(1) correction for correlation between consecutive sub-windows: the
    variance of the mean s²/k is multiplied by (1 + ρ)/(1 − ρ), with ρ the lag-1
    autocorrelation of the exponents plus 1/k (the estimator's bias for white noise), clipped to
    [0, ``RHO_MAX``] (e.g. Wilks 2011, Sec. 5.2.4, from memory); k − 1 degrees of freedom. A
    drift of the exponents across the window (a transient) shows as correlation and widens the
    interval. Measured coverage of the nominal 99 % Student-t interval on AR(1) noise with k = 8
    (tests/test_regimes.py): 99 % at ρ = 0, 97 % at ρ = 0.3, 94.5 % at ρ = 0.5 (without the
    correction 99 %, 96 %, 90 %).
    """
    M, k = lyap_sub.shape
    mean = lyap_sub.mean(axis=1)
    if k < 3:
        return mean, np.full(M, np.inf), np.zeros(M)
    d = lyap_sub - mean[:, None]
    ss = (d * d).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(ss > 0, (d[:, 1:] * d[:, :-1]).sum(axis=1) / ss, 0.0) + 1.0 / k
    rho = np.clip(np.nan_to_num(rho), 0.0, RHO_MAX)
    inflate = (1.0 + rho) / (1.0 - rho)
    se = np.sqrt(ss / (k - 1) / k * inflate)
    return mean, se, np.full(M, k - 1.0)


def envelope_rate(ev: Evidence) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least-squares slope of ln(amplitude) of the most oscillating state, with its standard error.

    Returns
    -------
    rate, se : ndarray (M,)
        NaN where some sub-window has no oscillation at all.
    relative : ndarray (M, k)
        Largest relative amplitude over the states in each sub-window.
    """
    amp = ev.high - ev.low  # (M, k, n)
    scale = np.abs(ev.mean) + ev.floor + 1e-300
    rel = amp / scale[:, None, :]
    rel = np.where(np.isfinite(rel), rel, 0.0)
    col = rel.max(axis=1).argmax(axis=1)
    env = amp[np.arange(len(col)), :, col]  # (M, k)
    t = ev.centre - ev.centre.mean()
    with np.errstate(divide="ignore", invalid="ignore"):
        y = np.log(env)
    ok = np.isfinite(y).all(axis=1)
    y = np.where(ok[:, None], y, 0.0)
    sxx = float((t * t).sum())
    slope = (y - y.mean(axis=1, keepdims=True)) @ t / sxx if sxx > 0 else np.zeros(len(y))
    resid = y - y.mean(axis=1, keepdims=True) - slope[:, None] * t
    dof = max(len(t) - 2, 0)
    se = np.sqrt((resid ** 2).sum(axis=1) / dof / sxx) if dof and sxx > 0 else np.full(len(y), np.inf)
    return np.where(ok, slope, np.nan), np.where(ok, se, np.nan), rel.max(axis=2)


def judge(ev: Evidence, rules: Rules) -> Verdict:
    """Apply the rules of the module docstring to one window (no doubling check)."""
    M, k = ev.lyap.shape
    lam, lam_se, dof = lyapunov_estimate(ev.lyap)
    tq = t_quantile(rules.confidence, dof)
    allowance = rules.flow_allowance / (ev.sub_window * k)
    negative, positive = lam + tq * lam_se < 0, lam - tq * lam_se > allowance
    lead = np.full(M, np.nan) if ev.leading is None else np.asarray(ev.leading, float)
    # stability: the Jacobian's leading eigenvalue where an equilibrium was found, else λ's interval
    stable = np.where(np.isfinite(lead), lead < 0, negative)
    rate, rate_se, rel = envelope_rate(ev)
    span = float(ev.centre[-1] - ev.centre[0]) if k > 1 else 0.0
    tb = t_quantile(rules.confidence, k - 2)
    with np.errstate(invalid="ignore"):
        big = np.abs(rate) * span > rules.env_tol
        decaying = (rate + tb * rate_se < 0) & big
        growing = (rate - tb * rate_se > 0) & big
    at_rest = rel[:, -1] < rules.eq_tol
    regime = np.full(M, "undetermined", dtype=object)
    period = np.zeros(M, int)
    reason = np.full(M, "", dtype=object)
    for i in range(M):
        if ev.extinct[i]:
            regime[i] = "extinction"
            continue
        if ev.failed[i] or not np.isfinite(lam[i]):
            regime[i] = "failed"
            continue
        if (at_rest[i] or decaying[i]) and stable[i]:
            regime[i], reason[i] = ("equilibrium", "") if not positive[i] else ("undetermined", Reason.SETTLING_POSITIVE.value)
            continue
        if at_rest[i]:
            reason[i] = Reason.UNSTABLE_REST.value if lead[i] > 0 else Reason.SLOW_DECAY.value
            continue
        p, few = _section_period(ev, i, rules)
        if positive[i]:
            regime[i], reason[i] = ("chaotic", "") if not p else ("undetermined", Reason.PERIOD_AND_CHAOS.value)
        elif negative[i] and not decaying[i] and not p:
            reason[i] = Reason.NOT_DECAYING.value
        elif decaying[i]:
            reason[i] = Reason.SLOW_DECAY.value
        elif growing[i]:
            reason[i] = Reason.DRIFT.value
        elif p:
            regime[i], period[i] = "cycle", p
        elif few:
            reason[i] = Reason.FEW_SECTION_POINTS.value
        else:
            regime[i] = "aperiodic"
    return Verdict(regime, period, lam, lam_se, np.where(at_rest, np.nan, rate), reason)


def detect_period_pieces(pieces, scale: float, period_tol: float, max_period: int) -> tuple[int, bool]:
    """Smallest period shared by several pieces of a section (e.g. sub-windows with gaps between).

    Only pairs (s[i], s[i+k]) inside one piece are compared, so the gaps between pieces do not
    break a period. Shift k is testable when the pieces hold at least k such pairs (as a single
    sequence of 2k points does). Returns the period (0 if none) and whether some shift up to
    ``max_period`` was not testable (too few points to rule periods out).
    """
    pieces = [np.asarray(x, float) for x in pieces]
    if not scale > 0:
        return 0, True
    for k in range(1, max_period + 1):
        diffs = [np.abs(x[k:] - x[:-k]) for x in pieces if x.size > k]
        n = sum(d.size for d in diffs)
        if n < max(k, 2):
            return 0, True
        if all(np.all(d <= period_tol * scale) for d in diffs):
            return k, False
    return 0, False


def _section_period(ev: Evidence, i: int, rules: Rules) -> tuple[int, bool]:
    """Period of the section over the second half of the sub-windows, and whether points were too few."""
    col = int(ev.section[i])
    last = range(ev.k // 2, ev.k)
    scale = float(max(ev.high[i, j, col] - ev.low[i, j, col] for j in last))
    return detect_period_pieces([ev.sections[i][j] for j in last], scale, rules.period_tol, rules.max_period)


def classify(ev: Evidence, rules: Rules) -> Verdict:
    """Verdict over the whole window, reported only where the first half agrees.

    λ, its standard error and the envelope rate are those of the whole window in every case.
    """
    full = judge(ev, rules)
    if ev.k < 4:
        return full
    half = judge(ev.head(ev.k // 2), rules)
    changed = (half.regime != full.regime) | (half.period != full.period)
    changed &= ~np.isin(full.regime, ("extinction", "failed"))
    regime = np.where(changed, "undetermined", full.regime).astype(object)
    period = np.where(changed, 0, full.period)
    reason = np.where(changed & (full.regime != "undetermined"), Reason.WINDOW_DOUBLING.value, full.reason)
    reason = np.where(changed & (full.regime == "undetermined") & (full.reason == ""), Reason.WINDOW_DOUBLING.value,
                      reason).astype(object)
    return Verdict(regime, period, full.lyapunov, full.lyapunov_se, full.envelope_rate, reason)


def map_verdict(lyap: np.ndarray, orbit: np.ndarray, rules: Rules) -> tuple[np.ndarray, np.ndarray]:
    """Regime and period of a one-dimensional map's orbits (every iterate is a section point).

    λ < 0 only says the orbit is stable, so the orbit alone separates cycles (a fixed point is a
    period-1 cycle) from the rest. Periods are judged against the orbit's size: an orbit
    converging to a fixed point with a negative multiplier alternates around it, and against its
    own shrinking amplitude it would look like period 2. No period and λ > 0 is ``chaotic``,
    otherwise ``aperiodic``.
    """
    M = len(lyap)
    regime = np.empty(M, dtype=object)
    period = np.zeros(M, int)
    for i in range(M):
        s = orbit[i][-2 * rules.max_period:]
        p = detect_period(s, float(np.abs(s).max()), rules.period_tol, rules.max_period)
        regime[i], period[i] = ("cycle", p) if p else ("chaotic" if lyap[i] > 0 else "aperiodic", 0)
    return regime, period


def share_interval(count, n, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a share ``count/n`` (Wilson 1927, JASA 22:209; Agresti & Coull 1998).

    Returns (low, high), each with the shape of ``count``; NaN where n = 0.
    """
    count, n = np.asarray(count, float), np.asarray(n, float)
    z = stats.norm.ppf(0.5 + 0.5 * confidence)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = count / n
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return np.clip(centre - half, 0, 1), np.clip(centre + half, 0, 1)


def predictability_shortfall(predictability_time, assessment_horizon: float) -> np.ndarray:
    """How much shorter the predictability horizon is than the assessment horizon: (M,) ≥ 0.

    Zero where the projection stays predictable over the whole assessment (λ ≤ 0, or a
    horizon at least as long as the assessment); NaN where the horizon is unknown. Only members
    with a positive shortfall deserve a warning.
    """
    h = np.asarray(predictability_time, float)
    return np.where(np.isnan(h), np.nan, np.maximum(assessment_horizon - h, 0.0))
