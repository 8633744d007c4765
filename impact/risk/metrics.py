"""Risk metrics per species and option, with their uncertainty.

Every function is pure: arrays in, arrays or tidy records out.
"""

from __future__ import annotations

import numpy as np
# scipy.special, not scipy.stats: the same numbers (the distributions call these functions) for
# a tenth of the import time, which every command pays
from scipy import special

BAND_QUANTILES = (0.05, 0.25, 0.50, 0.75, 0.95)


def clopper_pearson(k: np.ndarray, n: np.ndarray, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact binomial confidence interval for k successes in n trials (Clopper & Pearson 1934)."""
    k = np.asarray(k, float)
    n = np.asarray(n, float)
    a = 1.0 - confidence
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, special.betaincinv(k, n - k + 1, a / 2), 0.0)
        high = np.where(k < n, special.betaincinv(k + 1, n - k, 1 - a / 2), 1.0)
    low = np.where(n > 0, low, np.nan)
    high = np.where(n > 0, high, np.nan)
    return low, high


def quasi_extinction_probability(running_min: np.ndarray, threshold: float) -> tuple[int, int]:
    """Members whose abundance fell below the threshold by the horizon (Ginzburg et al. 1982).

    Parameters
    ----------
    running_min : ndarray (M,)
        Minimum abundance over [0, horizon] per member; NaN marks a failed member.

    Returns
    -------
    (k, n) : count that fell below, count of members assessed
    """
    ok = np.isfinite(running_min)
    return int((running_min[ok] < threshold).sum()), int(ok.sum())


# A species counted in individuals is gone when none is left; a continuous remainder of less than
# half an individual (between two counts) is taken as none.
NONE_BELOW = 0.5


def extinction_probability(running_min: np.ndarray, per_unit: float) -> tuple[int, int]:
    """Members in which a species counted in individuals fell to none by the horizon: a
    population of zero individuals, beside the quasi-extinction level of
    :func:`quasi_extinction_probability`.

    Parameters
    ----------
    running_min : ndarray (M,)
        Minimum abundance over [0, horizon] per member; NaN marks a failed member.
    per_unit : float
        Individuals in one unit of abundance.

    Returns
    -------
    (k, n) : count that fell to none, count of members assessed
    """
    ok = np.isfinite(running_min)
    return int((running_min[ok] * per_unit < NONE_BELOW).sum()), int(ok.sum())


def expected_minimum_abundance(running_min: np.ndarray, confidence: float = 0.95) -> tuple[float, float, float]:
    """Mean over members of the minimum abundance, with a normal-theory CI (McCarthy & Thompson 2001)."""
    x = running_min[np.isfinite(running_min)]
    if x.size == 0:
        return (np.nan, np.nan, np.nan)
    mean = float(x.mean())
    if x.size < 2:
        return (mean, np.nan, np.nan)
    half = special.ndtri(0.5 + confidence / 2) * x.std(ddof=1) / np.sqrt(x.size)
    return (mean, mean - half, mean + half)


def time_mean(times: np.ndarray, traj: np.ndarray, horizon: float) -> np.ndarray:
    """Time-averaged abundance over [0, horizon] by the trapezoid rule.

    Parameters
    ----------
    times : ndarray (T,)
    traj : ndarray (M, T)

    Returns
    -------
    ndarray (M,)
    """
    sel = times <= horizon + 1e-12
    t, x = times[sel], traj[:, sel]
    if t.size < 2:
        return x[:, 0].copy()
    # summed interval by interval, in time order: a reduction along the time axis may group the
    # terms differently for different numbers of members, and a member's numbers must not
    # depend on the ensemble it is computed in
    dt = np.diff(t)
    acc = np.zeros(x.shape[0])
    for k in range(dt.size):
        acc += 0.5 * dt[k] * (x[:, k] + x[:, k + 1])
    return acc / (t[-1] - t[0])


def paired_relative_change(option_mean: np.ndarray, baseline_mean: np.ndarray) -> np.ndarray:
    """Per-member relative change of mean abundance, option vs baseline on the same draw: (M,)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(baseline_mean > 0, option_mean / baseline_mean - 1.0, np.nan)


def recovery_times(times: np.ndarray, option: np.ndarray, baseline: np.ndarray, fraction: float) -> np.ndarray:
    """Time from first falling below ``fraction`` × the paired baseline to regaining it.

    0 where the option never fell below; inf where it had not recovered by the last time.

    Parameters
    ----------
    times : ndarray (T,)
    option, baseline : ndarray (M, T)

    Returns
    -------
    ndarray (M,) (NaN where either run failed)
    """
    with np.errstate(invalid="ignore"):
        below = option < fraction * baseline
    M, T = option.shape
    out = np.zeros(M)
    anyb = below.any(axis=1)
    first = np.argmax(below, axis=1)
    # first index at or after `first` where the member is no longer below
    idx = np.arange(T)[None, :]
    after = (~below) & (idx > first[:, None])
    rec = after.any(axis=1)
    first_rec = np.argmax(after, axis=1)
    out[anyb & rec] = times[first_rec[anyb & rec]] - times[first[anyb & rec]]
    out[anyb & ~rec] = np.inf
    bad = ~(np.isfinite(option).all(axis=1) & np.isfinite(baseline).all(axis=1))
    out[bad] = np.nan
    return out


def trajectory_bands(traj: np.ndarray, quantiles=BAND_QUANTILES) -> np.ndarray:
    """Quantiles across members at each time, ignoring failed members: (len(quantiles), T)."""
    with np.errstate(invalid="ignore"):
        if np.isfinite(traj).any():
            import warnings

            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                return np.nanquantile(traj, quantiles, axis=0)
    return np.full((len(quantiles), traj.shape[1]), np.nan)


# ----------------------------------------------------------------------------- interval kinds
# Every low/high pair written to a table carries one of these codes in its ``interval`` column
# and its level in ``level``; the report's captions are generated from the same descriptions.
INTERVAL_KINDS = {
    "clopper_pearson": "exact binomial confidence interval (Clopper & Pearson 1934)",
    "mean_normal": "normal-theory confidence interval of the mean over members",
    "member_quantiles": "5–95 % quantiles over members (the spread of outcomes, not a confidence interval)",
    "newcombe_paired": "confidence interval of a paired difference of proportions (Newcombe 1998, method 10)",
    "none": "no interval",
}
# the quantile band used for per-member spreads: 5 % and 95 %, so a 90 % band
QUANTILE_BAND = (0.05, 0.95)
QUANTILE_LEVEL = QUANTILE_BAND[1] - QUANTILE_BAND[0]


def describe_interval(kind: str, level: float) -> str:
    """Caption text for an interval kind and level, e.g. ``"95 % exact binomial confidence interval …"``."""
    if kind == "none":
        return INTERVAL_KINDS[kind]
    if kind == "member_quantiles":
        return INTERVAL_KINDS[kind]
    return f"{100 * level:.0f} % {INTERVAL_KINDS[kind]}"


def wilson(k: float, n: float, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for k successes in n trials (Wilson 1927; Newcombe 1998a, method 3)."""
    if n <= 0:
        return (np.nan, np.nan)
    z = special.ndtri(0.5 + confidence / 2)
    p = k / n
    centre = p + z * z / (2 * n)
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    den = 1 + z * z / n
    return (max(0.0, (centre - half) / den), min(1.0, (centre + half) / den))


def paired_difference_interval(first: np.ndarray, second: np.ndarray, confidence: float = 0.95
                               ) -> tuple[float, float, float, int]:
    """Difference of two paired proportions with its confidence interval.

    Newcombe (1998), "Improved confidence intervals for the difference between binomial
    proportions based on paired data", Statistics in Medicine 17:2635–2650, method 10: Wilson
    score limits of each proportion combined with the phi correlation of the pairs.

    Parameters
    ----------
    first, second : ndarray (M,) bool
        The event in each member under the first and the second run (same members).

    Returns
    -------
    (difference, low, high, n) : P(first) − P(second), its interval, and the pairs counted.
    """
    first = np.asarray(first, bool)
    second = np.asarray(second, bool)
    n = int(first.size)
    if n == 0:
        return (np.nan, np.nan, np.nan, 0)
    a = float(np.sum(first & second))
    b = float(np.sum(first & ~second))
    c = float(np.sum(~first & second))
    d = float(n - a - b - c)
    p1, p2 = (a + b) / n, (a + c) / n
    l1, u1 = wilson(a + b, n, confidence)
    l2, u2 = wilson(a + c, n, confidence)
    margins = (a + b) * (c + d) * (a + c) * (b + d)
    phi = 0.0
    if margins > 0:
        cross = a * d - b * c
        # Newcombe's continuity-corrected phi: shrunk towards 0 by n/2 when positive
        phi = (cross - n / 2 if cross > n / 2 else (cross if cross < 0 else 0.0)) / np.sqrt(margins)
    delta = p1 - p2
    low = delta - np.sqrt(max((p1 - l1) ** 2 - 2 * phi * (p1 - l1) * (u2 - p2) + (u2 - p2) ** 2, 0.0))
    high = delta + np.sqrt(max((p2 - l2) ** 2 - 2 * phi * (p2 - l2) * (u1 - p1) + (u1 - p1) ** 2, 0.0))
    return (float(delta), float(max(low, -1.0)), float(min(high, 1.0)), n)


def proportion(flags: np.ndarray, confidence: float = 0.95) -> tuple[float, float, float, int]:
    """Share of True among finite members with its exact binomial interval: (value, low, high, n)."""
    flags = np.asarray(flags, bool)
    n = int(flags.size)
    k = int(flags.sum())
    lo, hi = clopper_pearson(k, n, confidence)
    return (k / n if n else np.nan, float(lo), float(hi), n)
