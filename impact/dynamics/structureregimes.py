"""Regime shares by structure: the dynamics screen's verdicts (``dynamics/regimes.csv``) of each web's
members alone, for cases with structural doubts (``structures/regime_shares.csv``)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.dynamics.regime_screen import ATTRACTOR, share_table


def regime_shares_by_structure(names: tuple[str, ...], regimes: pd.DataFrame, index: np.ndarray) -> pd.DataFrame:
    """The columns of ``dynamics/regime_shares.csv`` after a ``structure`` column, per web and option.

    Parameters
    ----------
    names : tuple of str
        The webs' names, by structure index.
    regimes : DataFrame
        ``dynamics/regimes.csv`` (``member`` is the member's position in the ensemble).
    index : ndarray (M,) int
        Each member's structure.
    """
    frames = []
    web = index[regimes.member.to_numpy(np.int64)]
    for k, name in enumerate(names):
        mine = regimes[web == k]
        for _, g in mine.groupby("option", sort=False):
            rows = pd.DataFrame(share_table(g.reset_index(drop=True), ATTRACTOR))
            rows.insert(0, "structure", name)
            frames.append(rows)
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()
