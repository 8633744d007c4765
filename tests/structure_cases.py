"""A small web with two structural doubts whose effect on the data is linear-Gaussian (for tests).

Species ``a`` grows exponentially at an uncertain rate r ~ N(0, s²) (a truncated normal cut ten
standard deviations out); a constant predator ``b`` (no births, no deaths, efficiency 0, abundance 1)
may eat it (Holling type I, attack rate c): then d ln a/dt = r − c. The log of a lognormal index of
``a`` is therefore linear in r, with Gaussian errors: the evidence of each structure is closed form
(Bishop 2006, Pattern Recognition and Machine Learning, §3.4–3.5: the marginal likelihood of a
linear-Gaussian model). A second doubt (whether ``c`` eats ``e``) touches species nothing observes,
so the data cannot tell its choices apart.
"""

from __future__ import annotations

import numpy as np

from casefiles import to_toml

SPINUP = 10.0
TIMES = np.arange(-9.0, 1.0)          # monitoring times, counted from today
X = TIMES + SPINUP                    # time since the start of spin-up: 1 .. 10
A0 = 100.0


def toy_case(values, *, prior_sd: float, attack: float, log_sd: float, exists_b: float = 0.5,
             exists_c: float = 0.7) -> dict:
    """The case as a dict (write it with :func:`casefiles.to_toml`)."""
    return {
        "case": {"title": "linear-Gaussian structure test (invented)", "invented": True, "time_unit": "year",
                 "horizon": 2, "output_step": 1, "spinup": SPINUP, "members": 200, "seed": 1, "rtol": 1e-9,
                 "atol": 1e-12},
        "parameters": {"r": {"distribution": "truncated-normal", "mean": 0.0, "sd": prior_sd,
                             "low": -10 * prior_sd, "high": 10 * prior_sd, "unit": "1/year", "source": "test"}},
        "species": [
            {"name": "a", "growth": "exponential", "growth_rate": "r", "initial": A0, "quasi_extinction": 1e-6},
            {"name": "b", "growth": "none", "mortality": 0.0, "initial": 1.0, "quasi_extinction": 1e-6},
            {"name": "e", "growth": "exponential", "growth_rate": 0.0, "initial": 10.0, "quasi_extinction": 1e-6},
            {"name": "c", "growth": "none", "mortality": 0.0, "initial": 1.0, "quasi_extinction": 1e-6},
        ],
        "interactions": [
            {"kind": "predation", "predator": "b", "prey": "a", "response": "holling1", "attack_rate": attack,
             "efficiency": 0.0, "doubt": {"name": "b eats a", "label": "b eats a", "exists": exists_b,
                                          "absent": "b does not eat a"}},
            {"kind": "predation", "predator": "c", "prey": "e", "response": "holling1", "attack_rate": 0.01,
             "efficiency": 0.0, "doubt": {"name": "c eats e", "label": "c eats e", "exists": exists_c,
                                          "absent": "c does not eat e"}},
        ],
        "monitoring": [{"species": "a", "kind": "index", "error": "lognormal", "times": [float(t) for t in TIMES],
                        "values": [float(v) for v in values], "log_sd": log_sd, "source": "simulated"}],
        "interventions": [{"name": "nothing much", "kind": "press-harvest", "species": "a", "rate": 0.0,
                           "start": 0, "end": 1}],
        "options": [{"name": "wait", "interventions": ["nothing much"]}],
    }


def write_case(path, values, **kw):
    path.write_text(to_toml(toy_case(values, **kw)))
    return path


def log_evidence(y_log: np.ndarray, shift: float, prior_sd: float, log_sd: float) -> float:
    """ln p(y | structure) of log-observations ``y_log`` when d ln a/dt = r − shift, r ~ N(0, prior_sd²):
    y − ln A0 − (−shift)·x ~ N(0, σ²I + s²xxᵀ) (Bishop 2006, eq. 3.86 in matrix form)."""
    resid = y_log - np.log(A0) + shift * X
    cov = log_sd ** 2 * np.eye(X.size) + prior_sd ** 2 * np.outer(X, X)
    sign, logdet = np.linalg.slogdet(cov)
    return float(-0.5 * (resid @ np.linalg.solve(cov, resid) + logdet + X.size * np.log(2 * np.pi)))


def exact_weight(y_log: np.ndarray, prior: float, attack: float, prior_sd: float, log_sd: float) -> float:
    """Exact posterior probability that ``b`` eats ``a`` (prior ``prior``)."""
    l1 = log_evidence(y_log, attack, prior_sd, log_sd) + np.log(prior)
    l0 = log_evidence(y_log, 0.0, prior_sd, log_sd) + np.log(1 - prior)
    return float(1.0 / (1.0 + np.exp(l0 - l1)))


def simulate(rng: np.random.Generator, r: float, shift: float, log_sd: float) -> np.ndarray:
    """An index series (values) from d ln a/dt = r − shift with lognormal errors."""
    return np.exp(np.log(A0) + (r - shift) * X + log_sd * rng.standard_normal(X.size))
