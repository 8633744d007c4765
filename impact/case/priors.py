"""Prior distributions for uncertain parameters.

Every prior maps a unit-uniform number to a parameter value through its inverse CDF (``ppf``).
That single path serves the ensemble draws (uniforms from each member's own stream) and the
Sobol design (SALib's quasi-random unit hypercube), so both see the same distributions.

Each prior also states its support, ``support()`` → (low, high), and which ends of it the
distribution never reaches, ``open_ends`` → (bool, bool): a lognormal's support is (0, ∞) and it
never takes the value 0, so a field that must be > 0 accepts it, while a uniform on [0, 1] can
draw 0 and such a field refuses it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special


_TINY = np.finfo(float).tiny


@dataclass(frozen=True)
class Fixed:
    """A known value (no uncertainty)."""

    value: float
    kind = "fixed"
    open_ends = (False, False)  # ppf(0) and ppf(1) are the ends of the support

    def ppf(self, u):
        return np.full(np.shape(u), float(self.value))

    def describe(self) -> str:
        return f"{self.value:g}"

    def support(self) -> tuple[float, float]:
        return (self.value, self.value)


@dataclass(frozen=True)
class Uniform:
    """Uniform on [low, high]."""

    low: float
    high: float
    kind = "uniform"
    open_ends = (False, False)  # ppf(0) and ppf(1) are the ends of the support

    def ppf(self, u):
        return self.low + (self.high - self.low) * np.asarray(u, float)

    def describe(self) -> str:
        return f"uniform({self.low:g}, {self.high:g})"

    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class LogUniform:
    """Log-uniform on [low, high], low > 0."""

    low: float
    high: float
    kind = "log-uniform"
    open_ends = (False, False)  # ppf(0) and ppf(1) are the ends of the support

    def ppf(self, u):
        a, b = np.log(self.low), np.log(self.high)
        return np.exp(a + (b - a) * np.asarray(u, float))

    def describe(self) -> str:
        return f"log-uniform({self.low:g}, {self.high:g})"

    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class Triangular:
    """Triangular on [low, high] with the given mode."""

    low: float
    mode: float
    high: float
    kind = "triangular"
    open_ends = (False, False)  # ppf(0) and ppf(1) are the ends of the support

    def ppf(self, u):
        u = np.asarray(u, float)
        a, c, b = self.low, self.mode, self.high
        fc = (c - a) / (b - a)
        left = a + np.sqrt(u * (b - a) * (c - a))
        right = b - np.sqrt((1.0 - u) * (b - a) * (b - c))
        return np.where(u < fc, left, right)

    def describe(self) -> str:
        return f"triangular({self.low:g}, {self.mode:g}, {self.high:g})"

    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class PERT:
    """Beta-PERT on [low, high] with mode and shape weight ``lam`` (4 is the classic choice)."""

    low: float
    mode: float
    high: float
    lam: float = 4.0
    kind = "pert"
    open_ends = (False, False)  # ppf(0) and ppf(1) are the ends of the support

    def _shape(self):
        span = self.high - self.low
        alpha = 1.0 + self.lam * (self.mode - self.low) / span
        beta = 1.0 + self.lam * (self.high - self.mode) / span
        return alpha, beta

    def ppf(self, u):
        alpha, beta = self._shape()
        return self.low + (self.high - self.low) * special.betaincinv(alpha, beta, np.asarray(u, float))

    def describe(self) -> str:
        return f"PERT({self.low:g}, {self.mode:g}, {self.high:g})"

    def support(self):
        return (self.low, self.high)


def _log_normal_mass(a: float, b: float) -> float:
    """log(Φ(b) − Φ(a)) without cancellation: in the left tail by log-space differences (the right
    tail mirrored into it), across the middle as log1p(−Φ(a) − Φ(−b))."""
    if b <= 0:
        return float(np.real(special.logsumexp([special.log_ndtr(b), special.log_ndtr(a) + np.pi * 1j])))
    if a > 0:
        return _log_normal_mass(-b, -a)
    return float(special.log1p(-special.ndtr(a) - special.ndtr(-b)))


def standard_truncated_normal_ppf(u: np.ndarray, a: float, b: float) -> np.ndarray:
    """Inverse CDF of the standard normal truncated to [a, b], for u in (0, 1): same shape as u.

    Φ(x) = Φ(a) + u·(Φ(b) − Φ(a)) solved in log space (from the upper end, mirrored, when a ≥ 0),
    so that far tails keep their precision: the method and operations of scipy.stats.truncnorm
    (scipy 1.17), to which the tests compare it, without that module's import (half a second).
    """
    u = np.asarray(u, float)
    mass = _log_normal_mass(a, b)
    if a < 0:
        start = np.full(u.shape, special.log_ndtr(a))
        return special.ndtri_exp(special.logsumexp([start, np.log(u) + mass], axis=0))
    start = np.full(u.shape, special.log_ndtr(-b))
    return -special.ndtri_exp(special.logsumexp([start, np.log1p(-u) + mass], axis=0))


@dataclass(frozen=True)
class TruncatedNormal:
    """Normal(mean, sd) truncated to [low, high]."""

    mean: float
    sd: float
    low: float
    high: float
    kind = "truncated-normal"
    open_ends = (False, False)  # ppf(0) and ppf(1) are the ends of the support

    def ppf(self, u):
        a = (self.low - self.mean) / self.sd
        b = (self.high - self.mean) / self.sd
        u = np.asarray(u, float)
        inner = (u > 0) & (u < 1)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = standard_truncated_normal_ppf(np.where(inner, u, 0.5), a, b)
        # (rounding can put a far-tail value an ulp outside the bounds: a share on [0, 1] stays a share)
        out = np.where(inner, np.clip(z * self.sd + self.mean, self.low, self.high), np.nan)
        # the ends of [0, 1] go to the ends of the support, as scipy.stats computes them
        out = np.where(u == 0, a * self.sd + self.mean, np.where(u == 1, b * self.sd + self.mean, out))
        return out[()] if out.ndim == 0 else out

    def describe(self) -> str:
        return f"normal({self.mean:g}, sd {self.sd:g}) on [{self.low:g}, {self.high:g}]"

    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class LogNormal:
    """Lognormal with the given median and standard deviation of log(value)."""

    median: float
    log_sd: float
    kind = "lognormal"
    open_ends = (True, True)  # a lognormal never reaches 0 nor infinity

    def ppf(self, u):
        x = self.median * np.exp(self.log_sd * special.ndtri(np.asarray(u, float)))
        # u = 0 exactly (a stream's draw can be 0), or exp underflowing for a very wide log-sd, would give
        # 0, which the support excludes and a field that must be > 0 was promised it never sees: the
        # smallest positive float stands in (every other value, NaN included, is left untouched)
        return np.where(x == 0, _TINY, x)[()]

    def describe(self) -> str:
        return f"lognormal(median {self.median:g}, log-sd {self.log_sd:g})"

    def support(self):
        return (0.0, np.inf)


Prior = Fixed | Uniform | LogUniform | Triangular | PERT | TruncatedNormal | LogNormal

# distribution name -> (class, required fields, optional fields with defaults)
DISTRIBUTIONS: dict[str, tuple[type, tuple[str, ...], dict[str, float]]] = {
    "fixed": (Fixed, ("value",), {}),
    "uniform": (Uniform, ("low", "high"), {}),
    "log-uniform": (LogUniform, ("low", "high"), {}),
    "triangular": (Triangular, ("low", "mode", "high"), {}),
    "pert": (PERT, ("low", "mode", "high"), {"lam": 4.0}),
    "truncated-normal": (TruncatedNormal, ("mean", "sd", "low", "high"), {}),
    "lognormal": (LogNormal, ("median", "log_sd"), {}),
}


def prior_problems(prior: Prior) -> list[tuple[str, str]]:
    """Return ``(field, message)`` pairs for inconsistent prior arguments (empty when valid)."""
    out: list[tuple[str, str]] = []
    vals = {k: getattr(prior, k) for k in ("low", "high", "mode", "sd", "log_sd", "median", "lam") if hasattr(prior, k)}
    for k, v in vals.items():
        if not np.isfinite(v):
            out.append((k, f"must be a finite number, got {v!r}"))
    if out:
        return out
    if "low" in vals and "high" in vals and not vals["low"] < vals["high"]:
        out.append(("high", f"must be greater than low (low={vals['low']:g}, high={vals['high']:g}); bounds reversed or equal"))
    if "mode" in vals and not vals["low"] <= vals["mode"] <= vals["high"]:
        out.append(("mode", f"must lie within [low, high] = [{vals['low']:g}, {vals['high']:g}], got {vals['mode']:g}"))
    if isinstance(prior, LogUniform) and prior.low <= 0:
        out.append(("low", "log-uniform needs low > 0"))
    if "sd" in vals and vals["sd"] <= 0:
        out.append(("sd", "must be > 0"))
    if "log_sd" in vals and vals["log_sd"] <= 0:
        out.append(("log_sd", "must be > 0"))
    if isinstance(prior, LogNormal) and prior.median <= 0:
        out.append(("median", "must be > 0"))
    if isinstance(prior, PERT) and prior.lam <= 0:
        out.append(("lam", "must be > 0"))
    return out
