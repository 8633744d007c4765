"""Random draws of the ensemble: one path from the seed to every number.

Each draw index ``i`` owns the streams ``SeedSequence(seed, spawn_key=(i, purpose, ...))``,
so a member's parameters, noise and event outcomes depend only on the seed and its index,
never on how many members were drawn or how they were batched.
"""

from __future__ import annotations

import zlib

import numpy as np

from impact.case import Case
from impact.case.structures import STRUCTURE_KEY, switch_values
from impact.ensemble.streams import MASK32, PCG64Block, seed_words

PURPOSE_PARAMETERS = 0
PURPOSE_NOISE = 1
PURPOSE_EVENTS = 2
PURPOSE_STRUCTURE = 3
PURPOSE_INDIVIDUALS = 4  # births and deaths of species counted in individuals (impact.engine.individuals)
PURPOSE_COSTS = 16  # an option's uncertain cost (after the decision stage's purposes 7, 8, 11-15)


def _bits(seed: int, *key: int) -> np.random.PCG64:
    return np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key))


def _generator(seed: int, *key: int) -> np.random.Generator:
    return np.random.Generator(_bits(seed, *key))


# Generator.random() for PCG64 is (next 64 bits >> 11) · 2⁻⁵³; taking the bits straight from the
# bit generator gives the same numbers without building a Generator per stream (tested), which is
# most of the cost of a one-number stream.
_UNIT = 1.0 / 9007199254740992.0


def _block(seed: int, draws: np.ndarray, *key: int) -> PCG64Block | None:
    """The members' streams ``(i, *key)`` stepped together, or None when a draw index needs more
    than one 32-bit word (then the streams are built one by one: the same numbers)."""
    draws = np.asarray(draws, np.int64)
    if draws.size and (draws.min() < 0 or draws.max() > MASK32):
        return None
    keys = np.empty((draws.size, 1 + len(key)), np.int64)
    keys[:, 0] = draws
    keys[:, 1:] = key
    return PCG64Block(seed_words(seed, keys))


def _unit(raw: np.ndarray) -> np.ndarray:
    return (raw >> np.uint64(11)).astype(float) * _UNIT


def member_uniforms(seed: int, draws: np.ndarray, n: int) -> np.ndarray:
    """Unit-uniform numbers for the uncertain parameters: ndarray (len(draws), n)."""
    out = np.empty((len(draws), n))
    block = _block(seed, draws, PURPOSE_PARAMETERS)
    if block is not None:
        for j in range(n):
            out[:, j] = _unit(block.next())
        return out
    for k, i in enumerate(draws):
        out[k] = _unit(_bits(seed, int(i), PURPOSE_PARAMETERS).random_raw(n))
    return out


def unit_columns(case: Case) -> int:
    """Columns of a member's unit-hypercube row: the uncertain parameters, then (when the case has
    structural doubts) the uniform that picks its structure."""
    return len(case.uncertain) + (case.structures is not None)


def draw_uniforms(case: Case, seed: int, draws: np.ndarray) -> np.ndarray:
    """Each member's unit-hypercube row (len(draws), :func:`unit_columns`): the parameters' uniforms
    from its parameter stream and, with structural doubts, its structure's uniform from a stream of its
    own (so the parameters of a member are the same whether or not the case declares doubts)."""
    unit = member_uniforms(seed, draws, len(case.uncertain))
    if case.structures is None:
        return unit
    return np.concatenate([unit, first_uniforms(seed, draws, PURPOSE_STRUCTURE)[:, None]], axis=1)


def structure_index(case: Case, unit: np.ndarray) -> np.ndarray:
    """Each row's structure (an index into ``case.structures.structures``): (M,) int.

    Rows without the structure column (a design over the parameters alone) take the structure of
    highest prior weight; a case without doubts has the one structure 0.
    """
    M = unit.shape[0]
    st = case.structures
    if st is None:
        return np.zeros(M, np.int64)
    if unit.shape[1] == len(case.uncertain) + 1:
        return st.index(unit[:, -1])
    return np.full(M, st.mode(), np.int64)


def parameter_values(case: Case, unit: np.ndarray) -> dict[str, np.ndarray]:
    """Map unit-hypercube rows to parameter values through each prior's inverse CDF.

    Parameters
    ----------
    unit : ndarray (M, D) or (M, D + 1)
        Columns follow ``case.uncertain``, then the structure's uniform (see :func:`unit_columns`).

    Returns
    -------
    dict of str -> ndarray (M,)
        Every declared parameter, fixed ones broadcast, and with structural doubts every
        structure switch (:mod:`impact.case.structures`) at the value of each member's structure.
    """
    M = unit.shape[0]
    values = {}
    uncertain = case.uncertain
    for j, p in enumerate(uncertain):
        values[p.name] = p.prior.ppf(unit[:, j])
    for p in case.parameters:
        if not p.uncertain:
            values[p.name] = np.full(M, float(p.prior.value))
    if case.structures is not None:
        index = structure_index(case, unit)
        values.update(switch_values(case.structures, index, values))
        values[STRUCTURE_KEY] = index.astype(float)
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
    block = _block(seed, draws, PURPOSE_NOISE)
    if block is None:
        for k, i in enumerate(draws):
            z[k] = _generator(seed, int(i), PURPOSE_NOISE).standard_normal((n_units, S))
    else:
        # numpy's normal variates (its ziggurat) from each member's seeded state: one generator
        # object, re-seeded per member, instead of a seed sequence and a generator per member
        bits = np.random.PCG64(0)
        normal = np.random.Generator(bits)
        for k in range(M):
            bits.state = block.state(k)
            normal.standard_normal((n_units, S), out=z[k])
    z *= sd[:, None, :]
    z -= 0.5 * sd[:, None, :] ** 2
    return np.exp(z, out=z)


def first_uniforms(seed: int, draws: np.ndarray, *key: int) -> np.ndarray:
    """The first unit-uniform of each member's stream ``(i, *key)``: (len(draws),).

    ``Generator(PCG64(SeedSequence(seed, spawn_key=(i, *key)))).random()`` for every draw index i.
    """
    block = _block(seed, draws, *key)
    if block is not None:
        return _unit(block.next())
    return np.array([_unit(_bits(seed, int(i), *key).random_raw(1))[0] for i in draws])


def event_uniforms(seed: int, draws: np.ndarray, name: str) -> np.ndarray:
    """One unit-uniform per member for a chance event of the named intervention: (M,)."""
    return first_uniforms(seed, draws, PURPOSE_EVENTS, zlib.crc32(name.encode("utf-8")))


def cost_uniforms(seed: int, draws: np.ndarray, option: str) -> np.ndarray:
    """One unit-uniform per member for the named option's uncertain cost: (M,), from the member's stream
    ``(i, PURPOSE_COSTS, crc32(option))`` (independent of the other options and of the declaration order)."""
    return first_uniforms(seed, draws, PURPOSE_COSTS, zlib.crc32(option.encode("utf-8")))


def individuals_stream(seed: int, draw: int) -> np.random.Generator:
    """A fresh generator of draw index ``draw``'s births and deaths at low numbers
    (stream ``(draw, PURPOSE_INDIVIDUALS)``): the same numbers on every call, so every option of
    a member starts from the same stream (common random numbers)."""
    return _generator(seed, int(draw), PURPOSE_INDIVIDUALS)


def counting_for(case: Case, seed: int, draws: np.ndarray):
    """The species ``case`` counts in individuals at low numbers, with each member's stream
    (:class:`impact.engine.individuals.Counting`), or None when it counts none."""
    from impact.engine.individuals import Counting

    if not case.individuals:
        return None
    col = {n: i for i, n in enumerate(case.species_names)}
    draws = np.asarray(draws)
    return Counting(np.array([col[x.species] for x in case.individuals], np.int64),
                    np.array([x.per_unit for x in case.individuals]),
                    np.array([x.switch_below for x in case.individuals]),
                    lambda row: individuals_stream(seed, int(draws[row])))


# Population-level streams of the calibration (resampling, proposals, acceptance) are keyed by a
# first spawn-key element no draw index reaches, so they never coincide with a member's streams.
CALIBRATION_KEY = 2 ** 62


def calibration_generator(seed: int, generation: int, purpose: int = 0) -> np.random.Generator:
    """The calibration's random stream for one generation (and purpose) of the sampler."""
    return _generator(seed, CALIBRATION_KEY, int(generation), int(purpose))
