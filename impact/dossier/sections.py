"""The report's sensitivity, press-sign and dynamics sections, and the terminal's sentences on what the decision hinges on."""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.dossier.cautions import share_text
from impact.dossier.formatting import fmt_amount, fmt_bare_points, fmt_bare_prob, fmt_index, fmt_num, fmt_points, fmt_prob
from impact.store.results import Results
from impact.store.results import VALUED_TOGETHER, WEIGHTED
from impact.dossier.figures import Assets, distribution_figure, regime_figure, scan_figure

# the sensitivity section stays within two pages: per option at most this many outputs, each with
# its top parameters; the full tables are in sensitivity/*.csv
MAX_DRIVER_ROWS = 8
TOP_DRIVERS = 3
TOP_INFORMATION = 5
QUIET_INFORMATION = 3  # rows shown when no value of information is distinguishable from none
NEGLIGIBLE = 1e-9  # estimates below this are float noise of an exact zero
# a share of variance below this (printed as 0.00 or 0.01) explains nothing a reader can act on
VISIBLE_SHARE = 0.01
# "depends mostly on" a parameter only when it explains at least half the outcome's variance at the lower
# end of its interval: "mostly" read literally, as more than any rest (common practice, no source); below,
# the sentence says that no single parameter dominates and gives the largest shares with their intervals
DOMINANT_SHARE = 0.5


def _index_text(r) -> str:
    v, lo, hi = (_clean(x) for x in (r.value, r.low, r.high))
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return f"{fmt_index(v)} (no interval: the outcome barely varies across members)"
    return f"{fmt_index(v)} [{fmt_index(lo)}, {fmt_index(hi)}]"


def _explains(r) -> bool:
    """An index a sentence may lean on: visibly above zero, with an interval."""
    return float(r.value) >= VISIBLE_SHARE and np.isfinite(float(r.low)) and np.isfinite(float(r.high))


def _interval_points(r) -> str:
    return f"{fmt_points(_clean(r.value))} [{fmt_bare_points(_clean(r.low))}, {fmt_bare_points(_clean(r.high))}]"


def _detected(r) -> bool:
    """A value of information distinguishable from none: its lower limit is above 0 (the estimator's
    value for a number without influence is at most 0 on average; see impact.decision.voi)."""
    return _clean(r.low) > 0


def _information_sentence(obj: str, evpi, params: pd.DataFrame) -> str:
    """The choice made now, its EVPI, and the number most worth measuring only when distinguishable from none."""
    names = ["doing nothing (the baseline)" if c == "baseline" else f"“{c}”"
             for c in str(evpi.best_choice).split("; ")]
    best = names[0] if len(names) == 1 else f"{', '.join(names[:-1])} and {names[-1]}, tied"
    sentence = (f"Choosing now, the best choice for “{obj}” is {best} (a good outcome in {fmt_prob(evpi.best_chance)} "
                "of members). Knowing every uncertain number exactly would ")
    if _clean(evpi.high) == 0:
        sentence += f"not raise that chance on these members (EVPI {_interval_points(evpi)})"
    elif _detected(evpi):
        sentence += (f"raise that chance by {_interval_points(evpi)} on average (EVPI; chance events that no "
                     "measurement removes are left out)")
    else:
        sentence += (f"not detectably raise that chance: EVPI {_interval_points(evpi)}, an interval that reaches 0 "
                     "(what is left uncertain is chance, or an influence too small to show on these members)")
    return sentence + _worth_measuring(params)


def _worth_measuring(params: pd.DataFrame) -> str:
    if not len(params):
        return "."
    top = params.iloc[0]
    found = params[[_detected(r) for _, r in params.iterrows()]]
    if _detected(top):
        return f"; the single number most worth measuring is {top.parameter} ({_interval_points(top)}, EVPPI)."
    if len(found):
        r = found.iloc[0]
        return (f"; {r.parameter} is the number with the largest value of information distinguishable from none "
                f"({_interval_points(r)}, EVPPI); {top.parameter}'s is larger but not distinguishable from none "
                f"({_interval_points(top)}).")
    if _clean(top.value) > 0:
        return (f"; no single number's value of information is distinguishable from none on these members "
                f"(the largest EVPPI, {top.parameter}, is {_interval_points(top)}).")
    return "; no single number is worth measuring for this choice (every EVPPI is zero)."


def _dominates(r) -> bool:
    """An index that earns "depends mostly on": its whole interval at or above DOMINANT_SHARE."""
    return _explains(r) and float(r.low) >= DOMINANT_SHARE


def _information_context(info: pd.DataFrame) -> list[dict]:
    out = []
    for obj, g in info.groupby("objective", sort=False):
        evpi = g[g.kind == "evpi"].iloc[0]
        params = g[g.kind == "evppi"].sort_values("value", ascending=False, kind="stable")
        sentence = _information_sentence(obj, evpi, params)
        web = g[g.kind == "structure evppi"]  # cases with structural doubts (impact.decision.structurevoi)
        if len(web):
            w = web.iloc[0]
            sentence += (f" Knowing which web is true would raise it by {_interval_points(w)} (EVPPI of the structure"
                         + ("" if _detected(w) else "; not distinguishable from none") + ").")
        # a table of zeros reads as a finding: with nothing detected the sentence says so and the table
        # shrinks to the few largest (every row is in information.csv); with EVPI exactly 0 it goes
        detected = any(_detected(r) for _, r in g.iterrows())
        top = TOP_INFORMATION if detected else (0 if _clean(evpi.high) == 0 else QUIET_INFORMATION)
        shown = pd.concat([params.head(top), g[g.kind == "group evppi"].head(top), web.head(top)])
        rows = [dict(parameter=r.parameter + {"group evppi": " (group)", "structure evppi": " (which web is true)"}.get(
                         r.kind, ""),
                     value=f"{fmt_points(_clean(r.value))} [{fmt_bare_points(_clean(r.low))}, "
                           f"{fmt_bare_points(_clean(r.high))}]",
                     share=fmt_prob(_clean(r.value) / evpi.value) if evpi.value > NEGLIGIBLE else "—")
                for _, r in shown.iterrows()]
        out.append(dict(objective=obj, sentence=sentence, rows=rows, n=fmt_num(evpi.n)))
    return out


def _clean(v) -> float:
    v = float(v)
    return 0.0 if abs(v) < NEGLIGIBLE else v


def _drivers_context(drv: pd.DataFrame, roles: dict | None = None) -> list[dict]:
    # objectives first, then targets and protected species, then the rest in declaration order
    roles = roles or {}
    rank = {"target": 1, "protected": 1}
    out = []
    for opt, g in drv.groupby("option", sort=False):
        rows = []
        for (output, sp), h in g.groupby(["output", "species"], sort=False):
            h = h[np.isfinite(h.value.astype(float))].sort_values("value", ascending=False).head(TOP_DRIVERS)
            if h.empty:
                continue
            lead = h.iloc[0]
            rows.append(dict(output=output, species=sp, order=0 if output.startswith("objective") else
                             2 - rank.get(roles.get(sp), 0), top=[f"{r.parameter} {_index_text(r)}" for _, r in h.iterrows()],
                             explained=[f"{r.parameter} {_index_text(r)}" for _, r in h.iterrows() if _explains(r)],
                             dominant=f"{lead.parameter} {_index_text(lead)}" if _dominates(lead) else ""))
        rows.sort(key=lambda r: r["order"])  # stable: declaration order within each rank
        out.append(dict(option=opt, rows=rows[:MAX_DRIVER_ROWS], omitted=max(len(rows) - MAX_DRIVER_ROWS, 0),
                        n=fmt_num(g.n.iloc[0]), conditional_on=g.conditional_on.iloc[0]))
    return out


def _screen_context(s: dict) -> dict | None:
    """One paragraph on the Saltelli screen of the prior box: what makes today's web implausible, convergence."""
    idx, cv = s.get("indices"), s.get("convergence")
    if idx is None or idx.empty:
        return None
    meta = s.get("sensitivity") if isinstance(s.get("sensitivity"), dict) else {}
    plaus = idx[(idx.metric == "plausible") & (idx.option == "baseline")]
    plaus = plaus[np.isfinite(plaus.ST.astype(float))].sort_values("ST", ascending=False).head(TOP_DRIVERS)
    drivers = "; ".join(f"{r.parameter} (total order {fmt_num(r.ST)} ± {fmt_num(r.ST_conf)})"
                        + (" — interval crosses 0 or 1" if r.ST - r.ST_conf < 0 or r.ST + r.ST_conf > 1 else "")
                        for _, r in plaus.iterrows())
    settled = cv is not None and bool(cv[(cv.option == "baseline") & (cv.metric == "plausible")].converged
                                      .astype(str).str.lower().isin(["true", "1", "yes"]).all())
    if drivers and not settled:
        # an unconverged ranking is no headline: say so in the same sentence
        drivers += " (NOT converged: indicative only)"
    bad = 0 if cv is None else int((~cv.converged.astype(str).str.lower().isin(["true", "1", "yes"])).sum())
    total = 0 if cv is None else len(cv)
    return dict(N=meta.get("N", "not recorded"), runs=meta.get("runs", "not recorded"), drivers=drivers,
                converged=f"{total - bad} of {total} outputs converged" if total else "convergence not recorded",
                bad=bad)


def hinges_text(res: Results) -> str:
    """Plain sentences for the terminal: what each objective's choice hinges on, and what drives each outcome."""
    s = res.sensitivity or {}
    info, drv = s.get("information"), s.get("drivers")
    lines = []
    if info is not None and not info.empty:
        lines += [t["sentence"] for t in _information_context(info)]
    if drv is not None and not drv.empty:
        for t in _drivers_context(drv):
            for r in t["rows"]:
                if not r["output"].startswith("objective"):
                    continue
                name = r["output"].removeprefix("objective ").removesuffix(": good outcome")
                if r["dominant"]:
                    lines.append(f"Under “{t['option']}”, whether {name} goes well depends mostly on "
                                 f"{r['dominant']} (share of its variance explained, with interval; at least "
                                 f"{fmt_index(DOMINANT_SHARE)} even at the interval's lower end).")
                elif r["explained"]:
                    lines.append(f"Under “{t['option']}”, no single parameter dominates whether {name} goes well "
                                 f"(none explains {fmt_index(DOMINANT_SHARE)} of its variance at its interval's lower end; "
                                 "largest shares: " + "; ".join(r["explained"][:2]) + ").")
                else:
                    lines.append(f"Under “{t['option']}”, no single uncertain number explains a visible share of whether "
                                 f"{name} goes well (the outcome barely varies across the plausible members, or no "
                                 f"parameter alone explains it).")
    return "\n".join(lines)


def sensitivity_context(res: Results, assets: Assets) -> dict | None:
    s = res.sensitivity
    if not s:
        return None
    info, drv = s.get("information"), s.get("drivers")
    return dict(information=_information_context(info) if info is not None and not info.empty else [],
                drivers=_drivers_context(drv, res.manifest.roles)
                if drv is not None and not drv.empty else [],
                screen=_screen_context(s), files=sorted(f"sensitivity/{k}.csv" for k, v in s.items()
                                                        if isinstance(v, pd.DataFrame)))


def dynamics_context(res: Results, assets: Assets) -> dict | None:
    d = res.dynamics
    if not d:
        return None
    unit = res.manifest.time_unit
    ctx = dict(figures=[], shares=[], transitions=[], scan_run=False)
    sh = d.get("regime_shares")
    if sh is not None and not sh.empty:
        if sh.regime.nunique() > 1:  # one regime everywhere: the table says it all, a bar of one colour adds nothing
            ctx["figures"].append(dict(src=assets.add("regimes.png", regime_figure(sh), "image/png"),
                                       caption="Share of screened members in each dynamical regime, per option "
                                               "(long-run attractor, noise off; intervals in regime_shares.csv)."))
        for _, r in sh.iterrows():
            ctx["shares"].append(dict(option=r.option, regime=r.get("verdict", r.regime), share=share_text(r), count=fmt_num(r["count"]),
                                      lyapunov=fmt_num(r.lyapunov_median), horizon=fmt_num(r.horizon_median)))
    rg = d.get("regimes")
    if rg is not None and not rg.empty:
        ctx["figures"].append(dict(src=assets.add("lyapunov.png", distribution_figure(rg, unit, res.manifest.horizon),
                                              "image/png"),
                                   caption="Distribution over members of the largest Lyapunov exponent and of the "
                                           "predictability horizon, per option. The horizon axis stops at the "
                                           f"assessment horizon ({unit} {fmt_num(res.manifest.horizon)}, dashed); the "
                                           "hatched bars (one per option) count the members predictable beyond it, "
                                           "an infinite horizon (no growth of small errors) included."))
    sc = d.get("scan")
    if sc is not None and not sc.empty:
        ctx["scan_run"] = True
        for k, p in enumerate(dict.fromkeys(sc.parameter)):
            ctx["figures"].append(dict(src=assets.add(f"scan-{k}.png", scan_figure(sc, p), "image/png"),
                                       caption=f"Bifurcation diagram: long-run section values as {p} is scanned."))
    tr = d.get("transitions")
    if tr is not None and not tr.empty:
        for _, r in tr.iterrows():
            ctx["transitions"].append(dict(parameter=r.parameter, between=f"{fmt_num(r.from_value)} – {fmt_num(r.to_value)}",
                                           change=f"{r.from_regime} → {r.to_regime}", kind=r.kind))
    return ctx




# ----------------------------------------------------------------------------- what the structure alone decides
_MOVES = {"increase": "rises", "decrease": "falls", "no change": "does not move", "unresolved": "unresolved"}
# below this share of agreeing members a structural sign is contradicted by the members themselves
CONTRADICTED = 0.5


def _agreement(r) -> str:
    if not int(r.n):
        return "no member"
    if not np.isfinite(float(r.value)):
        return "— (no structural sign)"
    return f"{fmt_prob(r.value)} [{fmt_bare_prob(r.low)}, {fmt_bare_prob(r.high)}]"


def _members_move(r) -> str:
    """The members' own direction: the shares that rise, fall and do not move."""
    n = int(r.n)
    if not n:
        return "no member"
    up, down = int(r.increase), int(r.decrease)
    parts = [f"{word} in {fmt_prob(k / n)}" for word, k in (("rises", up), ("falls", down),
                                                             ("does not move", n - up - down)) if k]
    return ", ".join(parts)


def _press_sentences(g: pd.DataFrame) -> list[str]:
    """Plain sentences on one press: what the structure settles, what the strengths settle, what members contradict."""
    def names(rows):
        return ", ".join(f"{r.species} {_MOVES[r.predicted]}" for _, r in rows.iterrows())

    out = []
    sure = g[g.basis == "structure alone"]
    mostly = g[g.basis == "structure, mostly"]
    loose = g[g.basis == "interaction strengths"]
    out.append(f"Decided by the structure alone (no interaction strengths can reverse it): {names(sure)}."
               if len(sure) else "No response is decided by the structure alone.")
    if len(mostly):
        out.append(f"Likely from the structure (weighted prediction 0.5 or more): {names(mostly)}.")
    if len(loose):
        out.append("Left to the interaction strengths (the chains of effects point both ways): "
                   + ", ".join(loose.species) + ".")
    against = g[(g.n > 0) & np.isfinite(g.value.astype(float)) & (g.value.astype(float) < CONTRADICTED)]
    if len(against):
        out.append("Most members contradict the structural sign: "
                   + "; ".join(f"{r.species} {_members_move(r)} of them (structure: {_MOVES[r.predicted]})"
                               for _, r in against.iterrows())
                   + ". There the interaction strengths, or effects the signed web leaves out (saturating feeding, "
                     "shared handling time), outweigh the structure: read the members' direction.")
    return out


def press_context(res: Results) -> dict | None:
    """The section "What the structure alone decides", from press_signs.csv and press_signs.json."""
    t = res.press
    if t is None:
        return None
    rec = res.press_record or {}
    acts_on = {iv.name: iv.species for iv in res.manifest.interventions}
    groups = []
    for (iv, pressed, push), g in t.groupby(["intervention", "pressed", "press"], sort=False):
        g = g.drop_duplicates("species")
        opts = ", ".join(f"“{o}”" for o in dict.fromkeys(t[(t.intervention == iv)].option))
        rows = [dict(species=r.species, predicted=_MOVES[r.predicted], weight=fmt_index(r.weight),
                     basis=r.basis, members=_members_move(r), agree=_agreement(r)) for _, r in g.iterrows()]
        via = acts_on.get(iv, pressed)
        through = f", through the births of {via}" if via != pressed else ""
        groups.append(dict(title=f"A sustained push {'down' if push == 'decrease' else 'up'} on {pressed}{through} "
                                 f"({iv}; {'option' if ',' not in opts else 'options'} {opts})",
                           sentences=_press_sentences(g), rows=rows))
    tried, compared = rec.get("members_tried"), rec.get("members_compared")
    members = (f"{compared} of {tried} plausible members reach a stable baseline equilibrium that keeps every species; "
               "each member's own response there (−J⁻¹ of its Jacobian) is compared." if tried else "")
    det = rec.get("determinant")
    level = fmt_num(100 * float(t.level.iloc[0])) if len(t) else ""
    return dict(groups=groups, members=members, level=level, unstable=det is not None and det <= 0,
                unresolved=[f"{a} from {b}" for a, b in rec.get("unresolved", [])],
                nodes=", ".join(rec.get("nodes", [])))




def _evsi_points(r) -> str:
    return f"{fmt_points(_clean(r.evsi))} [{fmt_bare_points(_clean(r.low))}, {fmt_bare_points(_clean(r.high))}]"


def studies_context(res: Results, assets: Assets | None = None) -> dict | None:
    """The "Which study to fund" sentences: which study is worth its cost, which has value but not enough, and
    which has no value distinguishable from none (each with its EVSI interval and cost).

    Reads ``sensitivity/studies.csv`` only; None when the case declared no study (or the stage did not run).
    """
    t = (res.sensitivity or {}).get("studies")
    if t is None or t.empty:
        return None
    valued = t[t.objective == VALUED_TOGETHER].sort_values("enbs", ascending=False, kind="stable")
    per = t[t.objective != VALUED_TOGETHER]
    ctx = dict(valued=bool(len(valued)), sentence=_studies_sentence(valued, per), n=int(t.n.min()), figure=None,
               level=fmt_num(100 * float(t.level.iloc[0])))
    sizes = res.sensitivity.get("study_sizes")
    if assets is not None and sizes is not None and len(sizes):
        # the valued objectives together where declared, else the objective whose best study's ceiling is highest
        obj = VALUED_TOGETHER if len(valued) else str(per.sort_values("ceiling", ascending=False).objective.iloc[0])
        from impact.dossier.studyfigure import study_sizes_figure

        ctx["figure"] = assets.add("study-sizes.png", study_sizes_figure(sizes, obj), "image/png")
        ctx["figure_objective"] = obj if obj == VALUED_TOGETHER else f"for “{obj}”"
    return ctx


def _studies_sentence(valued: pd.DataFrame, per: pd.DataFrame) -> str:
    """Which study is worth its cost, which is not, and which has no value distinguishable from none."""
    if len(valued):
        unit = str(valued.unit.iloc[0])
        worth = [f"“{r.study}” (its information worth {fmt_amount(r.evsi)} [{fmt_amount(r.low)}, {fmt_amount(r.high)}] "
                 f"{unit} against a cost of {fmt_amount(r.cost)})" for r in valued.itertuples() if r.worth_cost == "yes"]
        short = [f"“{r.study}” ({fmt_amount(r.evsi)} [{fmt_amount(r.low)}, {fmt_amount(r.high)}] against "
                 f"{fmt_amount(r.cost)})"
                 for r in valued.itertuples() if r.worth_cost != "yes" and _detected(r)]
        flat = [f"“{r.study}”" for r in valued.itertuples() if not _detected(r)]
        out = ("Worth its cost even at the lower limit of its value, counting each good outcome at the value the case "
               "declares: " + "; ".join(worth) + "." if worth else
               "No candidate study is shown to be worth its cost on these members.")
        if short:
            out += " Of value, but not shown to be worth its cost: " + "; ".join(short) + "."
        if flat:
            out += (" No value distinguishable from none for the valued objectives together: " + ", ".join(flat)
                    + "; on these members their data are not shown to change the choice.")
        return out
    flat = [f"“{s}”" for s, g in per.groupby("study", sort=False) if not any(_detected(r) for r in g.itertuples())]
    seen = [f"“{r.study}” (cost {fmt_amount(r.cost)} {r.cost_unit}) for “{r.objective}”: {_evsi_points(r)}"
            for r in per.itertuples() if _detected(r)]
    out = ("The case declares no value of its outcomes in money or a common unit, so a study's value (in points of "
           "the chance of a good outcome) and its cost stand side by side; no study is called worth its cost.")
    if seen:
        out += " Value distinguishable from none: " + "; ".join(seen) + "."
    if flat:
        out += " No value distinguishable from none under any objective: " + ", ".join(flat) + "."
    return out


def _label(c: str) -> str:
    return "doing nothing" if c == "baseline" else f"“{c}”"


def _cost_text(r, noun: bool = False) -> str:
    """An expected cost, with the interval of its draws when it is uncertain; ``noun``: as "an
    expected cost of …" (or "a cost of …" when it is certain)."""
    rng = f" [{fmt_amount(r.low)}, {fmt_amount(r.high)}]" if r.low < r.high else ""
    if noun:
        return f"{'an expected cost' if rng else 'a cost'} of {fmt_amount(r.value)}{rng} {r.unit}"
    return f"{'expected ' if rng else ''}{fmt_amount(r.value)}{rng} {r.unit}"


def _budget_sentence(b: pd.DataFrame | None) -> str:
    """The best affordable set of options under the budget (budget.csv), with its chance of overrunning."""
    if b is None or b.empty:
        return ""
    r = b.iloc[0]
    head = f"Under the budget of {fmt_amount(r.budget)} {r.cost_unit}"
    if r.benefit_basis.startswith("doing nothing"):
        return head + ", no affordable option gains over doing nothing (budget.csv)."
    opts = " + ".join(f"“{o}”" for o in r.options.split(" + "))
    over = (f"; its cost exceeds the budget in {fmt_prob(r.chance_over_budget)} of the cost draws"
            if r.chance_over_budget > 0 else "")
    joint = (" Its benefit is the sum of its options' simulated gains, assumed additive: the set was not simulated "
             "together." if r.benefit_basis.startswith("assumed") else "")
    return f"{head}, the best affordable choice by expected cost is {opts} ({fmt_amount(r.cost)}{over}; budget.csv).{joint}"


def weighing_context(res: Results) -> dict | None:
    """The weighed comparison in words: the weights, the best weighted choice, SMAA acceptabilities, the most
    cost-effective option.

    Reads ``sensitivity/weighing.csv`` only; None when the case declared no ``[weighing]``.
    """
    t = (res.sensitivity or {}).get("weighing")
    if t is None or t.empty:
        return None
    stat = {(r.option, r.statistic): r for r in t.itertuples() if r.objective in ("", WEIGHTED)
            or r.statistic == "cost"}
    choices = list(dict.fromkeys(t[t.statistic == "chance"].option))
    weights = t[t.statistic.isin(["weight", "central_weight"])]
    uncertain = bool((t.statistic == "acceptability").any())
    lines = []
    if len(weights):
        kind = "Central weights of those the case allows" if uncertain else "Declared weights"
        lines.append(f"{kind}: " + "; ".join(f"“{r.objective}” {fmt_index(r.value)}" for r in weights.itertuples())
                     + ".")
        vals = [(stat[(c, "weighted_value")].value, c) for c in choices if (c, "weighted_value") in stat]
        best = max(vals)[1]
        lines.append(f"With these, {_label(best)} has the highest weighted value.")
    if uncertain:
        acc = sorted(((stat[(c, "acceptability")].value, c) for c in choices), reverse=True)
        se = stat[(acc[0][1], "acceptability")].mc_se
        lines.append(f"Over every weighting the case allows, {_label(acc[0][1])} ranks first for {fmt_prob(acc[0][0])} "
                     f"(± {fmt_bare_prob(se)}) of them (SMAA; " + ", ".join(f"{_label(c)} {fmt_prob(a)}" for a, c in acc[1:])
                     + ").")
    ranked = sorted((stat[(c, "efficiency_rank")].value, c) for c in choices if (c, "efficiency_rank") in stat)
    if ranked and stat[(ranked[0][1], "efficiency")].value > 0:
        best = ranked[0][1]
        lines.append(f"Most cost-effective (weighted gain over doing nothing per unit of cost): {_label(best)}, at "
                     f"{_cost_text(stat[(best, 'cost')], noun=True)}.")
    elif ranked:
        lines.append("No option gains over doing nothing in weighted chance of good outcomes, so none is cost-effective.")
    named = {ranked[0][1]} if ranked and stat[(ranked[0][1], "efficiency")].value > 0 else set()
    uncertain_costs = [c for c in choices if (c, "cost") in stat and stat[(c, "cost")].low < stat[(c, "cost")].high
                       and c not in named]
    if uncertain_costs:
        lines.append("Uncertain costs: " + "; ".join(f"{_label(c)} {_cost_text(stat[(c, 'cost')])}"
                                                    for c in uncertain_costs) + ".")
    budget = _budget_sentence((res.sensitivity or {}).get("budget"))
    if budget:
        lines.append(budget)
    unit = t[t.statistic == "cost"].unit
    return dict(sentence=" ".join(lines), uncertain=uncertain, n=int(t.n.iloc[0]),
                unit=str(unit.iloc[0]) if len(unit) else "none declared")
