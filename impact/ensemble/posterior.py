"""The calibration's results tables: prior against posterior, the SMC's generations, data against the
posterior predictive (:func:`calibration_tables`)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from impact.case import Case
from impact.ensemble.draws import Ensemble
from impact.ensemble.observe import draw_observations, has_data
from impact.ensemble.sample import calibration_generator

if TYPE_CHECKING:
    from impact.ensemble.calibrate import Calibration


def predictive_table(case: Case, ens: Ensemble, cal: Calibration, seed: int):
    """Data against the posterior predictive bands: one row per series and time.

    Columns: species, time, observed, kind, q05, q25, q50, q75, q95 (replicate data sets, one per member).
    """
    import pandas as pd

    if not case.monitoring or cal.recorded is None:
        return None
    reps = draw_observations(case, ens.values, cal.recorded, cal.times, calibration_generator(seed, 0, purpose=1))
    rows = []
    for s in case.monitoring:
        q = np.nanquantile(reps[s.species], [0.05, 0.25, 0.5, 0.75, 0.95], axis=0)
        for k, t in enumerate(s.times):
            rows.append(dict(species=s.species, time=t, observed=s.values[k], kind=s.kind,
                             **{f"q{p:02d}": q[i, k] for i, p in enumerate((5, 25, 50, 75, 95))}))
    return pd.DataFrame(rows)


# a parameter counts as informed when the data and constraints remove at least this share of its
# prior variance (posterior contraction, 1 − var_post / var_prior; common practice, no source)
INFORMED = 0.2


def _prior_moments(prior, grid: int = 20001) -> tuple[float, float]:
    u = (np.arange(grid) + 0.5) / grid
    x = np.asarray(prior.ppf(u), float)
    return float(x.mean()), float(x.std())


def posterior_table(case: Case, ens: Ensemble):
    """Prior against posterior for each uncertain parameter (which ones the data informed).

    Columns: parameter, unit, prior_q05, prior_q50, prior_q95, prior_mean, prior_sd, posterior_q05,
    posterior_q50, posterior_q95, posterior_mean, posterior_sd, contraction, informed.
    """
    import pandas as pd

    rows = []
    for p in case.uncertain:
        q = np.asarray(p.prior.ppf(np.array([0.05, 0.5, 0.95])), float)
        m, sd = _prior_moments(p.prior)
        x = ens.values[p.name]
        pq = np.quantile(x, [0.05, 0.5, 0.95])
        contraction = 1.0 - (x.std() / sd) ** 2 if sd > 0 else 0.0
        rows.append(dict(parameter=p.name, unit=p.unit, prior_q05=q[0], prior_q50=q[1], prior_q95=q[2],
                         prior_mean=m, prior_sd=sd, posterior_q05=pq[0], posterior_q50=pq[1], posterior_q95=pq[2],
                         posterior_mean=float(x.mean()), posterior_sd=float(x.std()), contraction=contraction,
                         informed=bool(contraction >= INFORMED)))
    return pd.DataFrame(rows)


def generations_table(cal: Calibration):
    """The SMC's generations: generation, tolerance, temperature, ess, acceptance, steps, simulations."""
    import pandas as pd

    return pd.DataFrame(cal.generations, columns=["generation", "tolerance", "temperature", "ess", "acceptance",
                                                  "steps", "simulations"])


def calibration_tables(case: Case, ens: Ensemble, cal: Calibration, seed: int) -> dict:
    """The results tables of the calibration (by relative path); none for a plain rejection draw."""
    if not has_data(case) and cal.sampler == "rejection":
        return {}
    out = {"calibration/posterior.csv": posterior_table(case, ens)}
    if cal.sampler == "smc":
        out["calibration/generations.csv"] = generations_table(cal)
    pred = predictive_table(case, ens, cal, seed)
    if pred is not None:
        out["calibration/predictive.csv"] = pred
    return out
