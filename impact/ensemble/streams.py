"""numpy's ``PCG64(SeedSequence(seed, spawn_key=(i, ...)))`` for many draw indices ``i`` at once.

Every member of the ensemble owns its random streams, keyed by its draw index (see
:mod:`impact.ensemble.sample`). Building numpy's objects one member at a time costs about 15 µs a
stream, all of it under Python's global lock: at 100,000 members and four streams a member,
seconds of a run that no second worker can share. The seeding and the generator are integer
arithmetic, so they run here as whole-array operations over the members, giving numpy's
numbers to the bit (tested against numpy's own objects).

The algorithms are numpy's (``numpy.random.SeedSequence``: O'Neill's seed-sequence hash mixing
with a pool of four 32-bit words; ``PCG64``: O'Neill 2014, the 128-bit linear congruential
generator with the XSL-RR output function).
"""

from __future__ import annotations

import numpy as np

# SeedSequence's hashing constants (numpy.random.bit_generator).
POOL_SIZE = 4
INIT_A = 0x43B0D7E5
MULT_A = 0x931E8875
INIT_B = 0x8B51F9DD
MULT_B = 0x58F38DED
MIX_MULT_L = 0xCA01F9DD
MIX_MULT_R = 0x4973F715
XSHIFT = 16
MASK32 = 0xFFFFFFFF
# PCG64's multiplier, as its high and low 64-bit halves.
PCG_MULT_HI = 2549297995355413924
PCG_MULT_LO = 4865540595714422341

_U32 = np.uint64(32)
_LOW32 = np.uint64(MASK32)


def words32(value: int) -> list[int]:
    """A non-negative integer as numpy's SeedSequence reads it: 32-bit words, least significant first."""
    if value < 0:
        raise ValueError("seed-sequence entropy must be non-negative")
    words = []
    while True:
        words.append(value & MASK32)
        value >>= 32
        if value == 0:
            return words


def _mul32(a: np.ndarray, b: int) -> np.ndarray:
    return (a * np.uint64(b)) & _LOW32


def _hashmix(value: np.ndarray, const: list[int]) -> np.ndarray:
    value = value ^ np.uint64(const[0])
    const[0] = (const[0] * MULT_A) & MASK32
    value = _mul32(value, const[0])
    return value ^ (value >> np.uint64(XSHIFT))


def _mix(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    result = (x * np.uint64(MIX_MULT_L) - y * np.uint64(MIX_MULT_R)) & _LOW32
    return result ^ (result >> np.uint64(XSHIFT))


def seed_words(seed: int, keys: np.ndarray) -> np.ndarray:
    """``SeedSequence(seed, spawn_key=keys[m]).generate_state(4, np.uint64)`` for every row m.

    Parameters
    ----------
    seed : int
        The run's seed (non-negative).
    keys : ndarray (M, k) of non-negative integers below 2**32
        Each member's spawn key (draw index, purpose, ...): one 32-bit word each.

    Returns
    -------
    ndarray (M, 4) uint64
    """
    keys = np.asarray(keys)
    if keys.ndim != 2 or (keys.size and (keys.min() < 0 or keys.max() > MASK32)):
        raise ValueError("keys must be an (M, k) array of integers in [0, 2**32)")
    M = keys.shape[0]
    run = words32(int(seed))
    if keys.shape[1] and len(run) < POOL_SIZE:
        run += [0] * (POOL_SIZE - len(run))  # numpy pads the seed when a spawn key follows
    entropy = [np.full(M, w, np.uint64) for w in run] + [keys[:, j].astype(np.uint64) for j in range(keys.shape[1])]
    const = [INIT_A]
    zero = np.zeros(M, np.uint64)
    pool = [_hashmix(entropy[i] if i < len(entropy) else zero, const) for i in range(POOL_SIZE)]
    for src in range(POOL_SIZE):
        for dst in range(POOL_SIZE):
            if src != dst:
                pool[dst] = _mix(pool[dst], _hashmix(pool[src], const))
    for src in range(POOL_SIZE, len(entropy)):
        for dst in range(POOL_SIZE):
            pool[dst] = _mix(pool[dst], _hashmix(entropy[src], const))
    const_b = INIT_B
    out32 = []
    for i in range(2 * POOL_SIZE):
        value = pool[i % POOL_SIZE] ^ np.uint64(const_b)
        const_b = (const_b * MULT_B) & MASK32
        value = _mul32(value, const_b)
        out32.append(value ^ (value >> np.uint64(XSHIFT)))
    return np.stack([out32[2 * k] | (out32[2 * k + 1] << _U32) for k in range(POOL_SIZE)], axis=1)


def _mul64(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Full 128-bit products of uint64 arrays: (high, low)."""
    a0, a1 = a & _LOW32, a >> _U32
    b0, b1 = b & _LOW32, b >> _U32
    p00, p01, p10, p11 = a0 * b0, a0 * b1, a1 * b0, a1 * b1
    mid = (p00 >> _U32) + (p01 & _LOW32) + (p10 & _LOW32)
    return p11 + (p01 >> _U32) + (p10 >> _U32) + (mid >> _U32), (p00 & _LOW32) | (mid << _U32)


def _add128(ah, al, bh, bl):
    lo = al + bl
    return ah + bh + (lo < al).astype(np.uint64), lo


class PCG64Block:
    """PCG64 generators of many members, stepped together: ``next()`` gives numpy's
    ``PCG64.random_raw()`` of each.

    Parameters
    ----------
    words : ndarray (M, 4) uint64
        Each member's :func:`seed_words`, as numpy's ``PCG64(seed_sequence)`` takes them.
    """

    def __init__(self, words: np.ndarray):
        M = words.shape[0]
        self._mult_hi = np.full(M, PCG_MULT_HI, np.uint64)
        self._mult_lo = np.full(M, PCG_MULT_LO, np.uint64)
        # pcg64 seeding: inc = (initseq << 1) | 1; state = 0; step; state += initstate; step
        seq_hi, seq_lo = words[:, 2], words[:, 3]
        self.inc_hi = (seq_hi << np.uint64(1)) | (seq_lo >> np.uint64(63))
        self.inc_lo = (seq_lo << np.uint64(1)) | np.uint64(1)
        self.hi, self.lo = self.inc_hi.copy(), self.inc_lo.copy()  # the first step from state 0
        self.hi, self.lo = _add128(self.hi, self.lo, words[:, 0], words[:, 1])
        self._step()

    def _step(self):
        hi, lo = _mul64(self.lo, self._mult_lo)
        hi = hi + self.lo * self._mult_hi + self.hi * self._mult_lo
        self.hi, self.lo = _add128(hi, lo, self.inc_hi, self.inc_lo)

    def next(self) -> np.ndarray:
        """The next 64 random bits of every member: (M,) uint64."""
        self._step()
        x = self.hi ^ self.lo
        rot = self.hi >> np.uint64(58)
        return (x >> rot) | (x << ((np.uint64(64) - rot) & np.uint64(63)))

    def state(self, m: int) -> dict:
        """Member ``m``'s state in the form of ``numpy.random.PCG64.state``."""
        return {"bit_generator": "PCG64",
                "state": {"state": int(self.hi[m]) << 64 | int(self.lo[m]),
                          "inc": int(self.inc_hi[m]) << 64 | int(self.inc_lo[m])},
                "has_uint32": 0, "uinteger": 0}
