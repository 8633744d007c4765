"""The one rejection sampler of the prior (:func:`impact.ensemble.draws.first_kept`).

Rejection sampling keeps a draw when it meets the condition, so the kept draws follow the prior
restricted to the condition (von Neumann 1951, "Various techniques used in connection with random
digits", NBS Applied Math. Series 12:36-38). The sampler here keeps the first ``members`` in draw
order; which ones must not depend on how the draws are cut into rounds (DEVELOPERS.md: a member's
numbers never depend on its batch; no published source).
"""

from __future__ import annotations

import numpy as np
import pytest

from impact.ensemble.draws import LowAcceptance, first_kept

RATE = 0.3  # acceptance probability of the invented condition u < RATE


def prior(start: int, stop: int) -> np.ndarray:
    """Uniform draws on [0, 1), each fixed by its own index (as the random path of impact.ensemble.sample)."""
    return np.array([np.random.default_rng(i).random() for i in range(start, stop)])


def judge(start: int, stop: int):
    u = prior(start, stop)
    return u < RATE, u


@pytest.mark.parametrize("quantum, least, done", [(1, 1, 0), (7, 1, 0), (64, 3, 0), (1, 1, 25), (16, 2, 40)])
def test_the_kept_draws_and_the_tries_do_not_depend_on_the_rounds(quantum, least, done):
    members = 30
    u = prior(0, 400)
    want = np.flatnonzero(u < RATE)[:members]
    first = judge(0, done) if done else None
    got = first_kept(judge, members, 400, quantum=quantum, least=least, done=first)
    np.testing.assert_array_equal(np.flatnonzero(got.kept)[:members], want)
    assert got.tried == want[-1] + 1 and got.n_kept == members
    values = np.concatenate(got.parts)
    np.testing.assert_array_equal(values, u[:values.size])  # the parts in draw order


def test_fewer_kept_than_wanted_tries_every_draw_allowed():
    got = first_kept(judge, 1000, 50, quantum=8)
    assert got.tried == got.kept.size == 50
    assert got.n_kept == int((prior(0, 50) < RATE).sum()) < 1000


def test_a_low_first_round_is_refused_and_a_later_one_is_not():
    # first round: at least 2 quanta of 100 draws, about 30 % kept, below the 50 % asked for
    with pytest.raises(LowAcceptance) as low:
        first_kept(judge, 500, 10_000, quantum=100, least=2, min_rate=0.5)
    assert low.value.tried == 600 and low.value.kept < 0.5 * low.value.tried  # ceil(1.1 · 500 / 100) quanta

    def dries_up(start, stop):  # nothing is kept after the first 100 draws
        kept, u = judge(start, stop)
        return kept & (np.arange(start, stop) < 100), u

    got = first_kept(dries_up, 100, 1000, quantum=100, least=1, min_rate=0.1)  # first round: 200 draws, ~15 % kept
    assert got.tried == 1000 and got.n_kept == int((prior(0, 100) < RATE).sum()) < 100


def test_the_kept_draws_follow_the_prior_restricted_to_the_condition():
    # Kept u are uniform on [0, RATE): mean RATE/2, standard deviation RATE/sqrt(12) (von Neumann
    # 1951). With 2,000 kept the mean's standard error is 0.0019, the acceptance share's
    # sqrt(p(1 − p)/tried); each margin is 5 standard errors (a false failure about once in a
    # million seeds for the two; the draws are fixed, so this is also a regression pin).
    got = first_kept(judge, 2000, 20_000, quantum=500)
    u = np.concatenate(got.parts)[got.kept][:2000]
    assert u.max() < RATE
    assert abs(u.mean() - RATE / 2) < 5 * RATE / np.sqrt(12) / np.sqrt(2000)
    assert abs(got.n_kept / got.tried - RATE) < 5 * np.sqrt(RATE * (1 - RATE) / got.tried)
