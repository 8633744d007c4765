"""The warnings page: one line per concern, ranked by how much it should shake the reader's confidence.

A concern that touches several options (numerical failures, cycling members, unconverged
indices) is one line naming every option it concerns, not one line per option. The fixed
cautions that defer to licensed ecological review and local regulation live in the template
and are always printed; these are the specific warnings read from the saved results.

Ranks (lower first): a run too thin for a verdict; fewer members than wanted; numerical
failures; objectives the interval cannot decide; most draws implausible; predictability
shorter than the assessment; cycling or aperiodic members; sensitivity problems; an invented
case. The order is the project's judgement (common practice, no source).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.dossier.formatting import fmt_bare_prob, fmt_num, fmt_prob
from impact.store.manifest import Manifest

RANK_THIN, RANK_SHORTFALL, RANK_FAILURES, RANK_UNDECIDED = 0, 1, 2, 3
RANK_IMPLAUSIBLE, RANK_PREDICTABILITY, RANK_OSCILLATION, RANK_SENSITIVITY, RANK_INVENTED = 4, 5, 6, 7, 8
RANK_CALIBRATION = RANK_IMPLAUSIBLE
# observations outside the posterior predictive 5-95 % band: about 10 % is expected; more than this
# share says the model cannot reproduce the monitoring (common practice, no source)
MISFIT_SHARE = 0.3
# more than half of the draws rejected: priors at odds with observations (common practice, no source)
IMPLAUSIBLE_SHARE = 0.5
OSCILLATING = {"cycle": "cycling", "irregular": "aperiodic (neither settling nor repeating)",
               "aperiodic": "aperiodic (neither settling nor repeating)"}


@dataclass(frozen=True)
class Caution:
    """One specific warning: its rank (0 most serious) and its text."""

    rank: int
    text: str


def _join(parts: list[str]) -> str:
    return "; ".join(parts)


def _member_cautions(m: Manifest, thin_reason: str) -> list[Caution]:
    c = m.counts
    out = []
    if thin_reason:
        out.append(Caution(RANK_THIN, thin_reason))
    tried, kept, wanted = c.tried, c.kept, c.wanted
    if kept < wanted and not thin_reason:
        out.append(Caution(RANK_SHORTFALL, f"Only {kept} of the {wanted} wanted plausible members were found within "
                                           "the draw limit; every interval is wider than planned."))
    failed = {opt: f for opt, f in c.failed_by_option.items() if f.get("failed")}
    if failed:
        parts = []
        for opt, f in failed.items():
            reasons = ", ".join(f"{k} {v}" for k, v in f.items() if k != "failed")
            parts.append(f"{f['failed']} of {kept} under {opt}" + (f" ({reasons})" if reasons else ""))
        out.append(Caution(RANK_FAILURES, "Members that failed numerically (counted, not dropped silently; every "
                                          "table gives the n behind each number): " + _join(parts) + "."))
    cal = m.calibration or {}
    if cal.get("sampler") == "smc":
        # SMC spends many simulations per member by design: judge the priors on the prior draws
        share = float(cal.get("prior_acceptance", 1.0))
        if share < IMPLAUSIBLE_SHARE:
            out.append(Caution(RANK_IMPLAUSIBLE, f"Most prior draws were implausible: {fmt_prob(share)} met every "
                                                 "constraint (persistence, observed ranges, limits on change). The "
                                                 "ensemble was calibrated by sequential Monte Carlo, so every member "
                                                 "meets them, but the priors and the observations disagree."))
    elif tried and kept / tried < IMPLAUSIBLE_SHARE:
        out.append(Caution(RANK_IMPLAUSIBLE, f"Most draws were implausible: {kept} of {tried} draws tried were kept "
                                             f"({c.failed} failed numerically, {c.extinct} lost a "
                                             f"species, {c.out_of_range} lay outside an observed range). The "
                                             "priors and the observations disagree."))
    elif c.failed:
        out.append(Caution(RANK_FAILURES, f"{c.failed} of {tried} draws failed numerically during spin-up and "
                                          "were not kept."))
    return out


def _objective_cautions(objectives: pd.DataFrame) -> list[Caution]:
    und = objectives[(objectives.status == "undecided") & (objectives.option != "baseline")]
    if und.empty:
        return []
    parts = [f"“{obj}” under {', '.join(g.option)}" for obj, g in und.groupby("objective", sort=False)]
    return [Caution(RANK_UNDECIDED, "Objectives the interval cannot decide (the interval straddles the requirement; "
                                    "more members would narrow it): " + _join(parts) + ".")]


def share_text(r) -> str:
    """A regime share with its interval, where the table gives one."""
    if "share_low" in r and pd.notna(r.share_low):
        return f"{fmt_prob(r.share)} [{fmt_bare_prob(r.share_low)}, {fmt_bare_prob(r.share_high)}]"
    return fmt_prob(r.share)


def _regime_cautions(m: Manifest, dynamics: dict) -> list[Caution]:
    shares = dynamics.get("regime_shares")
    if shares is None or shares.empty:
        return []
    H, unit = float(m.horizon), m.time_unit
    out = []
    if "shortfall_max" in shares:
        short = shares[(shares.share > 0) & (shares.shortfall_max.astype(float) > 0)]
    else:  # results written before the shortfall column: compare the median horizon directly
        short = shares[(shares.regime == "chaotic") & (shares.share > 0)
                       & (shares.horizon_median.astype(float) < H)].assign(shortfall_max=np.nan)
    if not short.empty:
        parts = [f"{r.option}: {share_text(r)} of members {r.regime}"
                 + (f", horizon up to {fmt_num(r.shortfall_max)} {unit} short" if pd.notna(r.shortfall_max) else "")
                 for _, r in short.iterrows()]
        out.append(Caution(RANK_PREDICTABILITY,
                           f"Members whose predictability horizon is shorter than the {fmt_num(H)} {unit} assessed "
                           "(individual trajectories cannot be predicted that far; read the bands, not single runs): "
                           + _join(parts) + "."))
    for regime, what in OSCILLATING.items():
        rows = shares[(shares.regime == regime) & (shares.share > 0)]
        if rows.empty:
            continue
        parts = [f"{r.option} {share_text(r)} ({fmt_num(r['count'])} member{'' if int(r['count']) == 1 else 's'})"
                 for _, r in rows.iterrows()]
        out.append(Caution(RANK_OSCILLATION, f"Members that are {what} in the dynamics screen (long-run attractor, noise "
                           "off): " + _join(parts) + ". The timing of peaks and troughs is uncertain; read the bands, "
                           "not single runs."))
    und = shares[(shares.regime == "undetermined") & (shares.share > 0)]
    if not und.empty:
        reasons = (dynamics.get("dynamics") or {}).get("undetermined_reasons", {}) if isinstance(
            dynamics.get("dynamics"), dict) else {}
        regimes = dynamics.get("regimes")
        seen = [] if regimes is None or "reason" not in regimes else sorted(
            set(regimes[regimes.regime == "undetermined"].reason.dropna().astype(str)) - {""})
        why = "; ".join(reasons.get(k, k) for k in seen)
        out.append(Caution(RANK_OSCILLATION, "Members whose regime the screen could not settle: "
                           + _join([f"{r.option} {share_text(r)}" for _, r in und.iterrows()])
                           + (f" (why: {why})" if why else "") + "; their long-run behaviour is unknown."))
    record = dynamics.get("dynamics") if isinstance(dynamics.get("dynamics"), dict) else {}
    if str(record.get("seasons", "")).startswith("averaged"):
        out.append(Caution(RANK_OSCILLATION, "The case has seasons; the regime screen and the predictability horizon "
                                             "describe the season-averaged web (births at their season-mean rate), not "
                                             "the seasonally forced one, which can cycle or become irregular where the "
                                             "averaged web settles. The risk tables and bands come from the forced runs."))
    return out


def _sensitivity_cautions(sens: dict) -> list[Caution]:
    out = []
    conv = sens.get("convergence")
    if conv is not None and not conv.empty:
        bad = conv[conv.converged.astype(str).str.lower().isin(["false", "0", "no"])]
        if not bad.empty:
            parts = [f"{opt} {len(g)} of {int((conv.option == opt).sum())}" for opt, g in bad.groupby("option", sort=False)]
            out.append(Caution(RANK_SENSITIVITY,
                               "Sensitivity indices that did not converge (interval width or N/2 shift above the "
                               f"tolerance of {fmt_num(bad.tolerance.iloc[0])}), outputs per run: " + _join(parts)
                               + "; their rankings are provisional (list in sensitivity/convergence.csv)."))
    meta = sens.get("sensitivity")
    failures = meta.get("failures") if isinstance(meta, dict) else None
    if isinstance(failures, dict):
        by_opt = {k: int(v) for k, v in (failures.get("points_failed_by_option") or {}).items() if int(v)}
        refused = int(failures.get("refused_outputs", 0) or 0)
        if by_opt or refused:
            parts = [f"{k} {v}" for k, v in by_opt.items()]
            out.append(Caution(RANK_SENSITIVITY, "Sensitivity design runs that failed numerically: "
                               + (_join(parts) if parts else "none") + f"; outputs refused for too many failures: "
                               f"{refused}."))
    return out


def _calibration_cautions(calibration: dict) -> list[Caution]:
    """Data that informed little, and data the calibrated model does not reproduce."""
    out = []
    post, pred = calibration.get("posterior"), calibration.get("predictive")
    if pred is None or pred.empty:
        return out
    if post is not None and not post.empty and not post.informed.astype(str).str.lower().isin(["true", "1"]).any():
        best = post.loc[post.contraction.astype(float).idxmax()]
        out.append(Caution(RANK_CALIBRATION, "The monitoring data informed little: no uncertain parameter lost a fifth "
                                             f"of its prior variance (largest: {best.parameter}, "
                                             f"{fmt_prob(max(float(best.contraction), 0.0))}; calibration/posterior.csv). "
                                             "The risks rest on the priors much as without the data."))
    parts = []
    for sp, g in pred.groupby("species", sort=False):
        outside = int(((g.observed < g.q05) | (g.observed > g.q95)).sum())
        if outside > MISFIT_SHARE * len(g):
            parts.append(f"{sp} {outside} of {len(g)}")
    if parts:
        out.append(Caution(RANK_CALIBRATION, "Monitoring data outside the calibrated model's 5–95 % predictive band "
                                             "(about 1 in 10 is expected): " + _join(parts) + ". The model does not "
                                             "reproduce these series; its structure or the observation model may be "
                                             "wrong."))
    return out


def cautions(m: Manifest, objectives: pd.DataFrame, thin_reason: str, dynamics: dict | None,
             sensitivity: dict | None, calibration: dict | None = None) -> list[Caution]:
    """Every specific warning of a results folder, one per concern, most serious first."""
    out = _member_cautions(m, thin_reason)
    out += _calibration_cautions(calibration or {})
    out += _objective_cautions(objectives)
    out += _regime_cautions(m, dynamics or {})
    out += _sensitivity_cautions(sensitivity or {})
    if m.case.invented:
        out.append(Caution(RANK_INVENTED, "The case file is marked INVENTED: it is an example, not real site data."))
    return sorted(out, key=lambda c: c.rank)
