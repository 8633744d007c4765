"""The value of knowing the web's structure: the EVPPI of the structure choice (the expected value
of model improvement, Strong & Oakley 2014, SIAM/ASA J. Uncertainty Quantification 2:106–125).

The structure is discrete, so the conditional expectation of each choice's net benefit given the
structure is the mean over that structure's members: a regression on the structure's indicator
columns (intercept and one column per structure but the first) fits those means. The value is then
estimated as the parameters' EVPPIs are (:func:`impact.decision.voi.rule_gains`): cross-fitted, so that a
member's chance events (which knowing the web would not remove) cannot make an irrelevant web look
valuable; the indicators are shrunk towards the common mean by a ridge whose weight generalised
cross-validation chooses, as a parameter's curve is shrunk towards "no influence". Values are
clipped at 0, with bootstrap intervals on the same resampling path; it is 0 within its interval
when every structure leads to the same best choice.
"""

from __future__ import annotations

import numpy as np

from impact.decision.voi import Estimate, bootstrap_counts, rule_gains

STRUCTURE_ROW = "web structure"  # the parameter column of its row in sensitivity/information.csv
KIND = "structure evppi"
PURPOSE_STRUCTURE_VOI = 15  # spawn-key purpose of its bootstrap stream


def indicator_design(index: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Intercept and one indicator column per structure present but the first (M, K), and its ridge
    penalty (K, K): the indicators shrink towards the intercept (all webs alike), the intercept is free."""
    index = np.asarray(index, np.int64)
    present = np.unique(index)
    X = np.column_stack([np.ones(index.size)] + [(index == k).astype(float) for k in present[1:]])
    return X, np.diag([0.0] + [1.0] * (X.shape[1] - 1))


def structure_evppi(nb: np.ndarray, index: np.ndarray, *, resamples: int = 100, confidence: float = 0.95,
                    seed: int = 0) -> Estimate:
    """EVPPI of the structure for net benefits ``nb`` (M, D) of D choices and member structures ``index`` (M,)."""
    nb = np.asarray(nb, float)
    X, S = indicator_design(index)
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(PURPOSE_STRUCTURE_VOI,))))
    W = np.vstack([np.ones((1, nb.shape[0])), bootstrap_counts(rng, nb.shape[0], resamples)])
    gains = np.maximum(rule_gains(nb, X, S, W)[0], 0.0)
    a = (1 - confidence) / 2
    return Estimate(float(gains[0]), float(np.quantile(gains[1:], a)), float(np.quantile(gains[1:], 1 - a)))
