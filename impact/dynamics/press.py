"""What the structure alone decides: qualitative press responses of the web, checked on the members.

The web's signed digraph is read from the case (:func:`community_signs`), its press responses and
their weighted predictions come from :mod:`impact.dynamics.loops` in exact integer arithmetic, and every
kept member at a stable equilibrium with the whole community present gives its own numerical press
response, −J⁻¹ of its Jacobian there (:func:`member_press_responses`). ``press_signs.csv`` puts
the two side by side for every species an option acts on (:func:`press_table`).

Reading of the model's terms as signs (near an equilibrium, where each species' per-capita
growth is zero, so only density-dependent terms leave a self-effect):

* a consumer eating a resource: −1 on the resource, +1 on the consumer's births (on its
  juvenile stage when the consumer is an adult whose births are born as juveniles);
* competition: −1 on the species from its competitor; mutualism: +1 on the beneficiary's births
  from its partner (facultative and obligate alike);
* self-limitation (−1 on the diagonal): logistic growth, crowding mortality, interference
  between consumers, a juvenile stage (it matures out), an adult stage (its losses are not
  matched by births of its own) and the carrion pool (it decays);
* life stages: +1 from the adult on its juveniles (births) and from the juveniles on the adult
  (maturation); carrion: +1 from every species whose deaths feed it.

Effects that only magnitudes decide are left out, as is common practice in loop analysis
(Puccia & Levins 1985, ch. 2): the positive self-effect a saturating functional response gives a
prey, and the indirect relief that a consumer's shared handling time gives one resource when
another is abundant. Two direct effects of opposite sign on one pair (two species eating each
other) leave that entry unresolved: it is set to 0 and named in :attr:`Community.unresolved`.
The members' Jacobians carry every term, so their agreement with the structural sign measures
what these readings leave out as well as what the interaction strengths decide.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.case import Case
from impact.engine.jacobian import jacobian
from impact.dynamics.loops import PressPrediction, press_prediction
from impact.risk.metrics import clopper_pearson
from impact.model import FoodWeb, WebParams, build_web, resolve
from impact.dynamics.timescales import equilibrium

# Dambacher et al. (2002; 2003) read a weighted prediction of 0.5 or more as a sign that holds
# for most interaction strengths (their simulations; the threshold is recalled from memory).
LIKELY_WEIGHT = 0.5
# A member's response counts as zero below this fraction of the largest response to the same press:
# its equilibrium is found to a relative residual of about 1e-6 (impact.dynamics.timescales), and the
# per-capita growth left over leaves responses up to ~1e-5 of the largest where the exact one is 0
# (measured on the casework's predator–prey case; common practice, no source).
ZERO_RESPONSE = 1e-4
# the direction in which each intervention kind pushes the growth of the species it acts on
PUSH = {"press-harvest": -1, "pulse-cull": -1, "eradication": -1, "fertility-control": -1, "sterile-release": -1,
        "release": 1, "first-arrival": 1}
# kinds that act on births: on an adult whose births are born as juveniles, they press the juveniles' growth
BIRTH_KINDS = ("fertility-control", "sterile-release")
BASIS = ("structure alone", "structure, mostly", "interaction strengths")
COLUMNS = ("option", "intervention", "pressed", "press", "species", "net", "terms", "weight", "predicted", "basis",
           "n", "agree", "value", "low", "high", "interval", "level", "increase", "decrease")


@dataclass(frozen=True)
class Community:
    """The signed community matrix of the species present today (and the carrion pool).

    Attributes
    ----------
    names : tuple of str
        Node names, in state order.
    columns : ndarray (k,) int
        Their state columns in the model.
    signs : ndarray (k, k) int
        ``signs[i, j]``: sign of the direct effect of node j on the growth of node i.
    unresolved : tuple of (str, str)
        Pairs (affected, acting) with direct effects of both signs, left at 0.
    """

    names: tuple[str, ...]
    columns: np.ndarray
    signs: np.ndarray
    unresolved: tuple[tuple[str, str], ...] = ()


def community_signs(case: Case, web: FoodWeb | None = None) -> Community:
    """The web's signed digraph among the species present today (see the module notes for the reading)."""
    web = web or build_web(case)
    S = web.n_species
    n = web.n_state
    adult_of = {a: j for j, a in web.stages}  # adult column -> its juvenile column
    parts: dict[tuple[int, int], set[int]] = {}

    def add(i: int, j: int, s: int):
        parts.setdefault((i, j), set()).add(s)

    for link in web.links:
        if link.resource < 0:
            continue  # a constant alternative food has no state
        add(link.resource, link.consumer, -1)
        add(adult_of.get(link.consumer, link.consumer), link.resource, 1)
    for i, j in web.competition:
        add(i, j, -1)
    for ben, par in web.mutualism + web.obligate:
        add(adult_of.get(ben, ben), par, 1)
    for j, a in web.stages:
        add(j, a, 1)
        add(a, j, 1)
        add(j, j, -1)
        add(a, a, -1)
    crowded = [i for i, sp in enumerate(case.species) if sp.crowding_mortality not in (0, 0.0)]
    for i in [*np.flatnonzero(web.logistic), *crowded, *web.interference]:
        add(int(i), int(i), -1)
    if web.has_carrion:
        add(S, S, -1)
        for i in np.flatnonzero(web.carrion_yield > 0):
            add(S, int(i), 1)
    full = np.zeros((n, n), dtype=np.int64)
    unresolved = []
    names = web.state_names
    for (i, j), s in parts.items():
        if len(s) == 1:
            full[i, j] = s.pop()
        else:
            unresolved.append((names[i], names[j]))
    keep = np.array([i for i in range(n) if i >= S or case.species[i].present], dtype=int)
    return Community(tuple(names[i] for i in keep), keep, full[np.ix_(keep, keep)], tuple(sorted(unresolved)))


def presses(case: Case, values: dict, members: int) -> list[tuple[str, str, str, int]]:
    """(option, intervention, species, push) for every intervention acting on a species present today.

    ``push`` is +1 or −1, the direction the intervention moves the species' growth; a
    carrying-capacity change pushes up when its factor's median over the members exceeds 1.
    Fertility control and sterile releases on an adult stage press its juveniles, into which its
    births are born.
    """
    present = {s.name for s in case.species if s.present}
    juvenile = {s.matures_into: s.name for s in case.species if s.matures_into is not None}
    out = []
    for o in case.options:
        for name in o.interventions:
            iv = case.intervention(name)
            if iv.species not in present:
                continue  # an introduction changes the web itself: no press on an equilibrium
            if iv.kind == "carrying-capacity-change":
                factor = resolve(iv.factor, values, members)
                push = 1 if float(np.median(factor)) > 1.0 else -1
            else:
                push = PUSH[iv.kind]
            pressed = juvenile.get(iv.species, iv.species) if iv.kind in BIRTH_KINDS else iv.species
            out.append((o.name, name, pressed, push))
    return out


def member_press_responses(web: FoodWeb, params: WebParams, controls, state: np.ndarray, columns: np.ndarray
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Each member's press responses −J⁻¹ at the equilibrium nearest its state, where stable.

    Parameters
    ----------
    params, controls : per-member parameters and controls (m members)
    state : ndarray (m, n_state)
        Where Newton's method starts (:func:`impact.dynamics.timescales.equilibrium`).
    columns : ndarray (k,) int
        State columns of the community; a member counts when every one of them is positive at its
        equilibrium, every other state is zero, and every eigenvalue of J there has a negative real part.

    Returns
    -------
    responses : ndarray (m, k, k)
        ``responses[r, i, j]``: change of node i per unit sustained press on the growth of node j
        (NaN rows for members that do not count).
    counted : ndarray (m,) bool
    """
    m, n = state.shape
    k = columns.size
    x, ok = equilibrium(web, params, controls, state)
    others = np.setdiff1d(np.arange(n), columns)
    ok &= (x[:, columns] > 0).all(axis=1) & (x[:, others] <= 0).all(axis=1)
    out = np.full((m, k, k), np.nan)
    if not ok.any():
        return out, ok
    rows = np.flatnonzero(ok)
    with np.errstate(all="ignore"):
        J = jacobian(web, params, controls, x[rows], rows)[:, columns][:, :, columns]
    finite = np.isfinite(J).all(axis=(1, 2))
    stable = np.zeros(rows.size, bool)
    stable[finite] = np.linalg.eigvals(J[finite]).real.max(axis=1) < 0
    ok[rows[~stable]] = False
    good = rows[stable]
    if good.size:
        out[good] = -np.linalg.inv(J[stable])  # one small matrix per member: nothing mixes members
    return out, ok


def response_signs(responses: np.ndarray) -> np.ndarray:
    """Signs of finite responses (m, k, k), 0 below :data:`ZERO_RESPONSE` of the largest response to the same press."""
    scale = np.abs(responses).max(axis=1, keepdims=True)
    return np.where(np.abs(responses) <= ZERO_RESPONSE * scale, 0, np.sign(responses)).astype(int)


def baseline_responses(case: Case, params: WebParams, values: dict, baseline, community: Community
                       ) -> tuple[np.ndarray, int]:
    """Signs of the members' press responses at the baseline's long-run equilibrium.

    Each kept member whose baseline run did not fail starts Newton's method from its baseline
    state at the assessment horizon, under the controls of doing nothing with seasons averaged
    (as the regime screen does); a member that finds no stable equilibrium keeping every species
    from there starts again from its time-mean abundances over the assessment (near the
    equilibrium a cycling or seasonal web turns around).

    Returns
    -------
    signs : ndarray (c, k, k) int
        Response signs of the c members that count (:func:`member_press_responses`).
    tried : int
        Members tried (kept, baseline run not failed).
    """
    from impact.engine.simulate import controls_at, season_mean_phi

    web = build_web(case)
    sel = np.flatnonzero(~np.asarray(baseline.failed, bool))
    sub = _rows(params, sel)
    vals = {k: np.asarray(v)[sel] for k, v in values.items()}
    S = web.n_species
    t_last = case.horizon - 1e-9 * max(case.horizon, 1.0)
    c = controls_at(case, None, vals, t_last, season_mean_phi(case, sel.size), sel.size, S, season_averaged=True)
    start = np.asarray(baseline.final, float)[sel]
    resp, counted = member_press_responses(web, sub, c, start, community.columns)
    rest = np.flatnonzero(~counted)
    if rest.size:
        start[:, :S] = np.asarray(baseline.mean, float)[sel, baseline.slot(case.horizon), :S]
        again, second = member_press_responses(web, _rows(sub, rest), _rows(c, rest), start[rest], community.columns)
        resp[rest[second]] = again[second]
        counted[rest[second]] = True
    return response_signs(resp[counted]), int(sel.size)


def _rows(arrays, rows: np.ndarray):
    """A dataclass of per-member arrays (parameters, controls) restricted to ``rows``."""
    return type(arrays)(*(getattr(arrays, f)[rows] for f in arrays.__dataclass_fields__))


def _predicted(net: int, terms: int, push: int) -> tuple[str, int | None]:
    if terms == 0:
        return "no change", 0
    if net == 0:
        return "unresolved", None
    return ("increase", 1) if push * net > 0 else ("decrease", -1)


def _basis(weight: float) -> str:
    return BASIS[0] if weight >= 1.0 else BASIS[1] if weight >= LIKELY_WEIGHT else BASIS[2]


def press_rows(community: Community, prediction: PressPrediction, pushes, signs: np.ndarray,
               confidence: float = 0.95) -> pd.DataFrame:
    """press_signs.csv from the structure's prediction and the members' response signs.

    Parameters
    ----------
    pushes : list of (option, intervention, species, push)
    signs : ndarray (c, k, k) int
        Members' response signs to a positive press (c may be 0).
    confidence : float
        Level of the exact binomial interval on the share of members that agree.
    """
    index = {name: i for i, name in enumerate(community.names)}
    weight = prediction.weight
    rows = []
    for option, iv, pressed, push in pushes:
        j = index[pressed]
        for i, species in enumerate(community.names):
            net, terms = int(prediction.net[i, j]), int(prediction.terms[i, j])
            predicted, sign = _predicted(net, terms, push)
            member = push * signs[:, i, j]
            n = int(member.size)
            agree = int((member == sign).sum()) if sign is not None else None
            lo, hi = clopper_pearson(agree, n, confidence) if agree is not None else (np.nan, np.nan)
            rows.append(dict(option=option, intervention=iv, pressed=pressed, press="increase" if push > 0 else "decrease",
                             species=species, net=net, terms=terms, weight=float(weight[i, j]), predicted=predicted,
                             basis=_basis(float(weight[i, j])), n=n,
                             agree=float(agree) if agree is not None else np.nan,
                             value=agree / n if agree is not None and n else np.nan, low=float(lo), high=float(hi),
                             interval="clopper_pearson", level=confidence, increase=int((member > 0).sum()),
                             decrease=int((member < 0).sum())))
    return pd.DataFrame(rows, columns=list(COLUMNS))


def press_table(case: Case, params: WebParams, values: dict, baseline) -> tuple[pd.DataFrame, dict]:
    """press_signs.csv of an assessment, and a record of how it was made.

    Parameters
    ----------
    params, values : the kept members' parameters (:class:`impact.ensemble.draws.Ensemble`)
    baseline : impact.risk.runs.Summary
        The baseline run (its state at the horizon and its failures).
    """
    community = community_signs(case)
    members = len(np.asarray(baseline.failed))
    pushes = presses(case, values, members)
    prediction = press_prediction(community.signs)
    if pushes:
        signs, tried = baseline_responses(case, params, values, baseline, community)
    else:
        signs, tried = np.zeros((0, len(community.names), len(community.names)), int), 0
    record = {"nodes": list(community.names), "signs": community.signs.tolist(),
              "determinant": int(prediction.determinant), "unresolved": [list(p) for p in community.unresolved],
              "members_tried": tried, "members_compared": int(signs.shape[0])}
    return press_rows(community, prediction, pushes, signs, case.risk.confidence), record
