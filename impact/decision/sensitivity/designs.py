"""Designs on the unit hypercube that carry their own layout: Saltelli (Sobol) and Morris; the
sensitivity stage's random path."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

PURPOSE_SENSITIVITY = 7  # spawn-key purpose for the design scramble and the bootstrap
UNIT_EPS = 1e-10  # keep quasi-random points off the cube faces, where some inverse CDFs are infinite

DEFAULT_TOLERANCE = 0.2  # widest acceptable full CI width (±0.1) and N/2→N shift of an index (common practice, no source)
DEFAULT_FAILURE_LIMIT = 0.05  # largest acceptable share of failed design points (common practice, no source)
SCREEN_ABOVE = 20  # screen with Morris first when more uncertain parameters than this
SCREEN_KEEP = 0.1  # keep parameters whose mu* is at least this share of the largest (common practice, no source)
MIN_BLOCKS = 8  # fewer surviving base samples than this cannot support a bootstrap CI

UnitModel = Callable[[np.ndarray], np.ndarray]


def design_rng(seed: int, *key: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(PURPOSE_SENSITIVITY, *key))))


def salib_seed(seed: int, *key: int) -> int:
    # SALib treats a seed of 0 as "no seed" (global state); derive a non-zero one from our path
    return int(design_rng(seed, *key).integers(1, 2**31 - 1))


def unit_problem(names: Sequence[str]) -> dict:
    return {"num_vars": len(names), "names": list(names), "bounds": [[0.0, 1.0]] * len(names)}


@dataclass(frozen=True)
class SobolDesign:
    """A Saltelli design on the unit hypercube with its layout.

    Attributes
    ----------
    N : int
        Base samples (blocks).
    D : int
        Parameters varied.
    second_order : bool
        Whether the B_A blocks needed for second-order indices are present.
    names : tuple of str (D,)
    unit : ndarray (N * step, D)
        Rows in SALib's order: block i holds A_i, AB_i^(1..D), [BA_i^(1..D)], B_i.
    """

    N: int
    D: int
    second_order: bool
    names: tuple
    unit: np.ndarray = field(repr=False)

    @property
    def step(self) -> int:
        """Rows per base sample."""
        return 2 * self.D + 2 if self.second_order else self.D + 2

    @property
    def runs(self) -> int:
        return self.N * self.step

    def block_of_rows(self) -> np.ndarray:
        """Base-sample index of every row: (runs,)."""
        return np.repeat(np.arange(self.N), self.step)

    def head(self, n: int) -> "SobolDesign":
        """The design made of the first ``n`` base samples (a Sobol' prefix is itself a design)."""
        if not 0 < n <= self.N:
            raise ValueError(f"head({n}) of a design with N={self.N}")
        return SobolDesign(n, self.D, self.second_order, self.names, self.unit[: n * self.step])

    def base_rows(self) -> np.ndarray:
        """Row indices of the A and B matrices (independent draws from the prior): (2N,)."""
        starts = np.arange(self.N) * self.step
        return np.concatenate([starts, starts + self.step - 1])

    def problem(self) -> dict:
        return unit_problem(self.names)


def sobol_design(names: Sequence[str], N: int, second_order: bool, seed: int) -> SobolDesign:
    """Saltelli's cross-sampling of a scrambled Sobol' sequence (Saltelli 2002; Saltelli et al. 2010)."""
    from SALib.sample import sobol as sobol_sample

    names = tuple(names)
    if N < 2 or N & (N - 1):
        raise ValueError(f"base samples must be a power of two >= 2, got {N}")
    u = sobol_sample.sample(unit_problem(names), N, calc_second_order=second_order, scramble=True,
                            seed=design_rng(seed, 0))
    return SobolDesign(N, len(names), bool(second_order), names, np.clip(u, UNIT_EPS, 1.0 - UNIT_EPS))


@dataclass(frozen=True)
class MorrisDesign:
    """Morris one-at-a-time trajectories on the unit hypercube with their layout.

    Attributes
    ----------
    trajectories : int
    D : int
    levels : int
    names : tuple of str (D,)
    unit : ndarray (trajectories * (D + 1), D)
    """

    trajectories: int
    D: int
    levels: int
    names: tuple
    unit: np.ndarray = field(repr=False)

    @property
    def runs(self) -> int:
        return self.trajectories * (self.D + 1)


def morris_design(names: Sequence[str], trajectories: int, seed: int, levels: int = 4) -> MorrisDesign:
    """Elementary-effect trajectories (Morris 1991) from SALib."""
    from SALib.sample import morris as morris_sample

    names = tuple(names)
    u = morris_sample.sample(unit_problem(names), trajectories, num_levels=levels, seed=salib_seed(seed, 1))
    return MorrisDesign(trajectories, len(names), levels, names, np.clip(u, UNIT_EPS, 1.0 - UNIT_EPS))


