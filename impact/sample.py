"""Random draws of the ensemble: one path from the seed to every number.

Each draw index ``i`` owns the streams ``SeedSequence(seed, spawn_key=(i, purpose, ...))``,
so a member's parameters, noise and event outcomes depend only on the seed and its index,
never on how many members were drawn or how they were batched.
"""

from __future__ import annotations

import zlib

import numpy as np

from .case import Case

PURPOSE_PARAMETERS = 0
PURPOSE_NOISE = 1
PURPOSE_EVENTS = 2


def _bits(seed: int, *key: int) -> np.random.PCG64:
    return np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key))


def _generator(seed: int, *key: int) -> np.random.Generator:
    return np.random.Generator(_bits(seed, *key))


# Generator.random() for PCG64 is (next 64 bits >> 11) · 2⁻⁵³; taking the bits straight from the
# bit generator gives the same numbers without building a Generator per stream (tested), which is
# most of the cost of a one-number stream.
_UNIT = 1.0 / 9007199254740992.0


def _uniforms(bits: np.random.PCG64, n: int) -> np.ndarray:
    return (bits.random_raw(n) >> np.uint64(11)).astype(float) * _UNIT


def member_uniforms(seed: int, draws: np.ndarray, n: int) -> np.ndarray:
    """Unit-uniform numbers for the uncertain parameters: ndarray (len(draws), n)."""
    out = np.empty((len(draws), n))
    for k, i in enumerate(draws):
        out[k] = _uniforms(_bits(seed, int(i), PURPOSE_PARAMETERS), n)
    return out


def parameter_values(case: Case, unit: np.ndarray) -> dict[str, np.ndarray]:
    """Map unit-hypercube rows to parameter values through each prior's inverse CDF.

    Parameters
    ----------
    unit : ndarray (M, D)
        Columns follow ``case.uncertain``.

    Returns
    -------
    dict of str -> ndarray (M,)
        Every declared parameter, fixed ones broadcast.
    """
    M = unit.shape[0]
    values = {}
    uncertain = case.uncertain
    for j, p in enumerate(uncertain):
        values[p.name] = p.prior.ppf(unit[:, j])
    for p in case.parameters:
        if not p.uncertain:
            values[p.name] = np.full(M, float(p.prior.value))
    return values


def noise_multipliers(seed: int, draws: np.ndarray, sd: np.ndarray, n_units: int) -> np.ndarray:
    """Mean-one lognormal growth multipliers, one per member, time unit and species.

    Parameters
    ----------
    sd : ndarray (M, S)
        Standard deviation of log(multiplier); 0 gives exactly 1.

    Returns
    -------
    ndarray (M, n_units, S)
    """
    M, S = sd.shape
    z = np.empty((M, n_units, S))
    for k, i in enumerate(draws):
        z[k] = _generator(seed, int(i), PURPOSE_NOISE).standard_normal((n_units, S))
    return np.exp(sd[:, None, :] * z - 0.5 * sd[:, None, :] ** 2)


def event_uniforms(seed: int, draws: np.ndarray, name: str) -> np.ndarray:
    """One unit-uniform per member for a chance event of the named intervention: (M,)."""
    tag = zlib.crc32(name.encode("utf-8"))
    return np.array([float(_bits(seed, int(i), PURPOSE_EVENTS, tag).random_raw() >> 11) * _UNIT for i in draws])


# Population-level streams of the calibration (resampling, proposals, acceptance) are keyed by a
# first spawn-key element no draw index reaches, so they never coincide with a member's streams.
CALIBRATION_KEY = 2 ** 62


def calibration_generator(seed: int, generation: int, purpose: int = 0) -> np.random.Generator:
    """The calibration's random stream for one generation (and purpose) of the sampler."""
    return _generator(seed, CALIBRATION_KEY, int(generation), int(purpose))
