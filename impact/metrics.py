"""Risk metrics per species and option, with their uncertainty.

Every function is pure: arrays in, arrays or tidy records out.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

BAND_QUANTILES = (0.05, 0.25, 0.50, 0.75, 0.95)


def clopper_pearson(k: np.ndarray, n: np.ndarray, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact binomial confidence interval for k successes in n trials (Clopper & Pearson 1934)."""
    k = np.asarray(k, float)
    n = np.asarray(n, float)
    a = 1.0 - confidence
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, stats.beta.ppf(a / 2, k, n - k + 1), 0.0)
        high = np.where(k < n, stats.beta.ppf(1 - a / 2, k + 1, n - k), 1.0)
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


def expected_minimum_abundance(running_min: np.ndarray, confidence: float = 0.95) -> tuple[float, float, float]:
    """Mean over members of the minimum abundance, with a normal-theory CI (McCarthy & Thompson 2001)."""
    x = running_min[np.isfinite(running_min)]
    if x.size == 0:
        return (np.nan, np.nan, np.nan)
    mean = float(x.mean())
    if x.size < 2:
        return (mean, np.nan, np.nan)
    half = stats.norm.ppf(0.5 + confidence / 2) * x.std(ddof=1) / np.sqrt(x.size)
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
