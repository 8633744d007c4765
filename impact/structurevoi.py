"""The value of knowing the web's structure: the EVPPI of the structure choice (the expected value
of model improvement, Strong & Oakley 2014, SIAM/ASA J. Uncertainty Quantification 2:106–125).

The structure is discrete, so the conditional expectation of each choice's net benefit given the
structure is the mean over that structure's members: a regression on the structure's indicator
columns (intercept and one column per structure but the first) fits exactly those means, and the
EVPPI is then the same estimator as a parameter's (:func:`impact.voi.evppi_from_design`), with
bootstrap intervals from :func:`impact.voi.weighted_evppi`. It is at most the EVPI and 0 when every
structure leads to the same best choice.
"""

from __future__ import annotations

import numpy as np

from .voi import Estimate, bootstrap_counts, evppi_from_design, weighted_evppi

STRUCTURE_ROW = "web structure"  # the parameter column of its row in sensitivity/information.csv
KIND = "structure evppi"
PURPOSE_STRUCTURE_VOI = 13  # spawn-key purpose of its bootstrap stream


def indicator_design(index: np.ndarray) -> np.ndarray:
    """Intercept and one indicator column per structure present but the first: (M, 1 + K' − 1)."""
    index = np.asarray(index, np.int64)
    present = np.unique(index)
    cols = [np.ones(index.size)] + [(index == k).astype(float) for k in present[1:]]
    return np.column_stack(cols)


def structure_evppi(nb: np.ndarray, index: np.ndarray, *, resamples: int = 100, confidence: float = 0.95,
                    seed: int = 0) -> Estimate:
    """EVPPI of the structure for net benefits ``nb`` (M, D) of D choices and member structures ``index`` (M,)."""
    nb = np.asarray(nb, float)
    X = indicator_design(index)
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(PURPOSE_STRUCTURE_VOI,))))
    W = bootstrap_counts(rng, nb.shape[0], resamples)
    reps = weighted_evppi(nb, X, W)
    a = (1 - confidence) / 2
    return Estimate(evppi_from_design(nb, X), float(np.quantile(reps, a)), float(np.quantile(reps, 1 - a)))
