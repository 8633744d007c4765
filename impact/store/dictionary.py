"""The data dictionary of a results folder: every file and every column, written as README.md into the folder.

One definition serves the folder's README.md, the contributor guide and the test that every written
column is documented and every documented column is written.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

_CI = "interval kind of low/high: clopper_pearson, newcombe_paired, mean_normal, member_quantiles, bootstrap_percentile"
_LEVEL = "level of that interval (0.95 for a 95 % confidence interval; 0.9 for the 5–95 % member quantiles)"
_N = "members behind the number (failed members excluded)"

# file -> (what it holds, {column: meaning}); a column named "*" stands for columns named by the case
DICTIONARY: dict[str, tuple[str, dict[str, str]]] = {
    "risk.csv": ("Per-species risk under doing nothing (baseline) and every option, per risk horizon.", {
        "option": "baseline or an option's name", "species": "species name",
        "metric": "quasi_extinction, extinct (a species counted in individuals fell to none: zero individuals; only for "
                  "species in [individuals]), expected_minimum, outbreak, mean_abundance, mean_change, recovery_time, "
                  "not_recovered",
        "horizon": "risk horizon, in the case's time unit", "value": "the estimate", "low": "lower limit",
        "high": "upper limit", "interval": _CI, "level": _LEVEL, "unit": "unit of value", "n": _N}),
    "effects.csv": ("Paired effects of each option against doing nothing, member by member on the same draws.", {
        "option": "option", "species": "species", "role": "target, protected or other", "direct":
        "True when an intervention of the option acts on the species", "metric":
        "mean_abundance, quasi_extinction or outbreak", "horizon": "risk horizon", "statistic":
        "median_change, p_worse, p_material, p_material_increase, p_material_decrease (abundance); difference, "
        "p_worse (events)", "value": "the estimate", "low": "lower limit", "high": "upper limit", "interval": _CI,
        "level": _LEVEL, "n": _N, "threshold": "material level used (fraction of abundance, or probability)"}),
    "objectives.csv": ("Each declared objective judged under each option (and doing nothing for a chance).", {
        "objective": "objective name", "option": "baseline or option", "species": "species", "measure":
        "abundance, quasi_extinction or outbreak", "horizon": "horizon of the objective", "event":
        "the objective's event in words", "requirement": "chance_at_least, chance_at_most, increase_at_most, "
        "decrease_at_least", "bound": "the requirement's number (probability units)", "statistic":
        "chance, increase or decrease", "value": "the estimate", "low": "lower limit", "high": "upper limit",
        "interval": _CI, "level": _LEVEL, "n": _N, "status": "met, not met or undecided (interval straddles)"}),
    "comparisons.csv": ("Doing nothing and every option compared by each objective's good outcome, on the members "
                        "where every run succeeded.", {
        "objective": "objective name", "option": "the run", "versus": "none (p_good), the other run (p_only), or "
        "all (best)", "statistic": "p_good (chance of a good outcome), p_only (paired chance of a good outcome "
        "where the other run has none) or best (1 for the runs with the highest chance of a good outcome, ties "
        "all named; 0 otherwise)", "value": "the estimate", "low": "lower limit (empty for best)",
        "high": "upper limit (empty for best)", "interval": _CI, "level": _LEVEL + " (empty for best)", "n": _N}),
    "bands.csv": ("Quantiles over members of every trajectory at every output time.", {
        "option": "baseline or option", "species": "species (or carrion)", "time": "output time",
        "q05": "5 % quantile", "q25": "25 % quantile", "q50": "median", "q75": "75 % quantile", "q95": "95 % quantile"}),
    "members.csv": ("Per-member summaries at the assessment horizon.", {
        "member": "draw index of the member (its identity in the random path)", "option": "baseline or option",
        "species": "species", "minimum": "lowest abundance over the period", "final": "abundance at the horizon",
        "mean": "time-mean abundance over the period", "failed": "True when the member's run failed numerically",
        "failure": "why it failed (ok when it did not)"}),
    "eradication.csv": ("Cases with [[surveillance]]: whether each surveyed target is gone under doing nothing and "
                        "every option, per risk horizon, the chance it comes back, and the empty surveys needed to "
                        "declare it gone (impact.risk.eradication).", {
        "option": "baseline or an option's name", "species": "the surveyed species", "horizon": "risk horizon",
        "gone_below": "abundance below which the species counts as gone (the case's gone_below)",
        "unit": "the species' unit", "chance_gone": "share of members whose running minimum fell below gone_below by "
        "the horizon", "gone_low": "lower limit of chance_gone", "gone_high": "upper limit of chance_gone",
        "chance_reinvaded": "among members gone by the horizon, mean chance that an arrival founded a population "
        "again since: 1 − exp(−arrival_rate × establishment × time since gone) (empty when none is gone)",
        "chance_success": "mean over members of the chance the species is gone and not founded again by the horizon",
        "success_low": "lower limit of chance_success", "success_high": "upper limit of chance_success",
        "interval": _CI, "level": _LEVEL, "n": _N,
        "detection_mean": "mean over members of the chance one survey detects the species when present",
        "confidence": "chance of absence at which eradication may be declared (the case's confidence)",
        "surveys_needed": "fewest empty surveys after which the chance of absence, Σ a/(Σ a + Σ (1 − a)(1 − p)^k) "
        "over members (a = chance_success of the member, p its detection), reaches confidence; empty when out of "
        "reach within 1000 surveys", "absence_reached": "the chance of absence after surveys_needed empty surveys",
        "survey": "what one survey is (the case's survey)"}),
    "eradication_members.csv": ("Cases with [[surveillance]]: per member, when each surveyed target went and its "
                                "surveillance values.", {
        "member": "draw index of the member", "option": "baseline or option", "species": "the surveyed species",
        "gone_at": "first output time at which the abundance was below gone_below (the horizon when it dipped "
        "between output times); empty when not gone within the assessment", "detection": "the member's chance one "
        "survey detects the species", "arrival_rate": "the member's arrivals from outside per time unit",
        "establishment": "the member's chance that one arrival founds a population"}),
    "parameters.csv": ("The kept members' parameter values.", {
        "member": "draw index of the member", "*": "one column per uncertain parameter, in its own unit; with "
        "structural doubts also structure (the web the member belongs to)"}),
    "priors.csv": ("Every declared parameter with its prior, unit and source.", {
        "name": "parameter", "distribution": "prior family", "arguments": "the prior in words", "unit": "unit",
        "source": "source given in the case", "description": "description", "uncertain":
        "False for a fixed value", "arg_*": "the prior's numeric arguments (blank where the family has none)"}),
    "sensitivity/drivers.csv": ("Main-effect indices on the plausible members, per option and outcome.", {
        "option": "option", "output": "an objective's good outcome, or a species' paired change (log ratio)",
        "species": "species", "parameter": "uncertain parameter", "value": "main-effect index (adjusted R²)",
        "low": "lower limit", "high": "upper limit", "interval": _CI, "level": _LEVEL, "n": _N,
        "conditional_on": "what the index is conditional on"}),
    "sensitivity/information.csv": ("Value of information per objective: EVPI and EVPPI.", {
        "objective": "objective", "parameter": "parameter, declared group, all parameters, or web structure "
        "(cases with structural doubts)", "kind": "evpi, evppi, group evppi or structure evppi (the value of "
        "knowing which web is true)", "value": "rise in the chance of a good outcome (probability units) from knowing the "
        "number(s) exactly, chance events left out; cross-fitted, clipped at 0 (a lower limit of 0: not "
        "distinguishable from no value)",
        "low": "lower limit", "high": "upper limit", "interval": _CI, "level": _LEVEL, "n": _N,
        "best_choice": "the choice made now (doing nothing = baseline); choices tied for best are joined by \"; \"", "best_chance":
        "its chance of a good outcome", "unit": "unit of value"}),
    "sensitivity/studies.csv": ("Which study to fund: expected value of sample information (EVSI) of each candidate "
                                "study, per objective and for the valued objectives together.", {
        "study": "candidate study (case file [[studies]])", "measures": "species, parameter or group",
        "target": "the species, parameter or group it measures", "error": "observation model",
        "samples": "counts or measurements taken (of each parameter, for a group)",
        "objective": "objective, or \"valued objectives together\" (their sum in the declared value unit)",
        "evsi": "EVSI: rise in the chance of a good outcome (probability units; the value unit for the valued sum) "
        "expected from deciding after the study; cross-fitted regression estimate, clipped at 0, capped at the ceiling",
        "low": "lower limit", "high": "upper limit",
        "distinguishable": "True when the lower limit is above 0 (else not distinguishable from no value)",
        "ceiling": "EVPPI of what the study measures (EVPI for a species survey): the most any such study could be worth",
        "ceiling_low": "its lower limit", "ceiling_high": "its upper limit",
        "ceiling_of": "the parameter or group of the ceiling, or all parameters",
        "cost": "the study's declared cost", "cost_unit": "its unit",
        "value_scale": "declared value of a certain good outcome (blank: none declared, no conversion made)",
        "enbs": "expected net benefit of sampling: evsi × value_scale − cost (blank without a value scale)",
        "enbs_low": "its lower limit", "enbs_high": "its upper limit",
        "worth_cost": "yes (enbs_low > 0), no (enbs_high < 0), undetermined, or no value scale",
        "interval": _CI, "level": _LEVEL, "n": _N, "unit": "unit of evsi"}),
    "sensitivity/study_sizes.csv": ("EVSI of each candidate study at ¼, ½, 1, 2 and 4 times its declared sample size "
                                    "(how large should it be?).", {
        "study": "candidate study", "objective": "objective, or \"valued objectives together\"",
        "samples": "sample size tried", "declared": "True at the declared size", "evsi": "EVSI at that size (as in "
        "studies.csv)", "low": "lower limit", "high": "upper limit",
        "ceiling": "EVPPI of what the study measures: the limit as the sample grows", "unit": "unit of evsi", "n": _N}),
    "sensitivity/weighing.csv": ("Options' costs and weighed objectives (case file [weighing]), one statistic a row.", {
        "option": "doing nothing (baseline) or an option (blank for a weight)",
        "objective": "objective, \"weighted objectives\", or blank for a cost",
        "statistic": "cost; chance (of a good outcome); cost_per_point (cost per percentage point gained over doing "
        "nothing); weight or central_weight (the declared share, or the centre of the feasible shares); weighted_value "
        "(Σ weight × swing value, 0 worst .. 1 best choice per objective); expected_gain (weighted chance gained over "
        "doing nothing: benefit × chance of success); efficiency (expected_gain ÷ cost, Joseph et al. 2009); "
        "efficiency_rank (1 = most cost-effective); acceptability (SMAA share of feasible weights ranking the choice "
        "first, Lahdelma et al. 1998); rank_acceptability (SMAA share ranking the choice at the row's rank, every rank 1 .. "
        "number of choices); central_weight_if_first (mean weight among those ranking it first)",
        "value": "the statistic's value (costs: the expected cost; cost_per_point and efficiency at it)",
        "low": "lower limit over the members' draws of uncertain costs (cost, cost_per_point, efficiency; the gain "
        "held at its expectation)", "high": "upper limit (as low)", "level": _LEVEL,
        "mc_se": "Monte Carlo standard error (acceptabilities only)",
        "rank": "the rank of a rank_acceptability row (1 = first; blank otherwise)",
        "unit": "unit of value", "n": _N}),
    "sensitivity/budget.csv": ("The best affordable sets of options under the declared budget ([weighing] budget), "
                               "best first.", {
        "rank": "1 = best (most weighted gain; ties to the cheaper set)", "options": "the options of the set "
        "(options sharing an intervention are never combined)", "interventions": "their interventions",
        "cost": "expected cost of the set (sum of the options' expected costs)", "cost_low": "lower limit over the "
        "members' draws of the costs", "cost_high": "upper limit", "budget": "the declared budget",
        "chance_over_budget": "share of the members' cost draws in which the set costs more than the budget",
        "benefit": "expected weighted gain over doing nothing (weighing.csv expected_gain; summed over the set)",
        "benefit_basis": "simulated (one option), assumed additive (a set never simulated together), or doing "
        "nothing", "method": "exhaustive enumeration (up to 20 options) or branch and bound (exact)",
        "cost_unit": "unit of the costs", "benefit_unit": "unit of benefit", "level": _LEVEL, "n": _N}),
    "sensitivity/indices.csv": ("Sobol indices of the prior screen (whole prior box, plausibility not applied).", {
        "option": "run", "metric": "output metric", "species": "species (or all)", "parameter": "parameter",
        "S1": "first-order index", "S1_conf": "its half-width", "ST": "total-order index", "ST_conf":
        "its half-width", "conditional_on": "what the index is conditional on", "N": "base samples"}),
    "sensitivity/second_order.csv": ("Second-order Sobol indices of the prior screen (when asked for).", {
        "option": "run", "metric": "output metric", "species": "species", "parameter_i": "first parameter",
        "parameter_j": "second parameter", "S2": "second-order index", "S2_conf": "its half-width"}),
    "sensitivity/ranking.csv": ("Parameters ranked by total-order index in the prior screen.", {
        "option": "run", "metric": "output metric", "species": "species", "rank": "rank (1 first)",
        "parameter": "parameter", "ST": "total-order index", "ST_conf": "its half-width", "S1": "first-order index",
        "interaction": "ST − S1"}),
    "sensitivity/convergence.csv": ("Convergence of the prior screen's indices (N against N/2).", {
        "option": "run", "metric": "output metric", "species": "species", "max_shift": "largest N/2-to-N shift",
        "max_ci_width": "widest full interval", "tolerance": "tolerance", "converged": "True when both within"}),
    "dynamics/regimes.csv": ("Dynamical regime of each screened member, per option (long-run attractor, noise off).", {
        "option": "run", "member": "draw index of the member", "regime": "equilibrium, cycle, aperiodic, chaotic "
        "or undetermined: the regime of the species that remain (extinction only when none remains)", "period":
        "period in maxima (cycles)", "lyapunov": "largest Lyapunov exponent (1/time unit), mean over sub-windows",
        "lyapunov_se": "its standard error (batch means, corrected for correlation between sub-windows)",
        "horizon_time": "predictability horizon (time unit; inf when errors do not grow)", "extinct":
        "True when a species was lost: below its quasi-extinction level at the horizon, or over a whole window",
        "extinct_species": "which species were lost (;-separated)", "verdict": "the regime as read, e.g. "
        "\"equilibrium of the remaining web; moth and primrose extinct\"", "reason":
        "why the verdict is undetermined (codes explained in dynamics.json)", "envelope_rate":
        "decay rate of the oscillation envelope (1/time unit)", "window": "time diagnosed", "shortfall":
        "how much shorter than the assessment the predictability horizon is (0 when not)",
        "amplitude_*": "oscillation size (max − min) of each species over the window"}),
    "dynamics/regime_shares.csv": ("Share of screened members in each regime, per option (one row per verdict).", {
        "option": "run", "regime": "regime", "verdict": "regime with the species lost (as in regimes.csv)",
        "extinct_species": "species lost (;-separated; empty when none)", "share": "share of members", "share_low": "lower limit (95 % Wilson)",
        "share_high": "upper limit", "count": "members", "diagnosed": "members screened", "lyapunov_median":
        "median Lyapunov exponent", "horizon_median": "median predictability horizon", "shortfall_max":
        "largest shortfall of the predictability horizon against the assessment", "basis": "what was diagnosed"}),
    "dynamics/horizon_amplitude.csv": ("Each member's oscillation size over the assessment horizon, noise as in the risk.", {
        "option": "run", "member": "draw index of the member", "amplitude_*": "max − min of each species",
        "basis": "what was measured"}),
    "dynamics/risk_by_regime.csv": ("Risk metrics within each regime, per option.", {
        "option": "run", "regime": "regime", "species": "species", "metric": "metric", "value": "value"}),
    "press_signs.csv": ("What the web's structure alone decides: the sign of each species' response to a sustained "
                        "press on a species an option acts on (loop analysis), and how often the members agree.", {
        "option": "option", "intervention": "the option's intervention read as the press", "pressed":
        "species whose growth it pushes (for fertility control or sterile releases on an adult stage, its juveniles, "
        "into which its births are born)", "press": "decrease or increase: the direction it pushes that species' growth",
        "species": "responding species (or carrion)", "net": "net number of complementary feedback terms, adj(−A), "
        "for a positive press (an exact integer)", "terms": "total number of those terms (absolute feedback matrix)",
        "weight": "weighted prediction |net| / terms (1 where no term links the two: no response)",
        "predicted": "increase, decrease, no change or unresolved (terms cancel), under this option's press",
        "basis": "structure alone (weight 1), structure, mostly (weight at least 0.5) or interaction strengths",
        "n": "members at a stable baseline equilibrium with every species present, compared", "agree":
        "members whose own press response (−J⁻¹ of their Jacobian) has the predicted sign (blank when unresolved)",
        "value": "agree / n", "low": "lower limit", "high": "upper limit", "interval": _CI, "level": _LEVEL,
        "increase": "members whose species rises under this press", "decrease": "members whose species falls"}),
    "calibration/posterior.csv": ("Prior against posterior for each uncertain parameter: what the monitoring data "
                                  "and the constraints taught.", {
        "parameter": "uncertain parameter", "unit": "its unit", "prior_q05": "5 % prior quantile",
        "prior_q50": "prior median", "prior_q95": "95 % prior quantile", "prior_mean": "prior mean",
        "prior_sd": "prior standard deviation", "posterior_q05": "5 % quantile over the members",
        "posterior_q50": "median over the members", "posterior_q95": "95 % quantile over the members",
        "posterior_mean": "mean over the members", "posterior_sd": "standard deviation over the members",
        "contraction": "share of the prior variance removed (1 − posterior variance / prior variance)",
        "informed": "True when the contraction is at least 0.2"}),
    "calibration/generations.csv": ("The sequential Monte Carlo sampler's generations (diagnostics).", {
        "generation": "generation (0: prior draws)", "tolerance": "largest distance from the constraints allowed "
        "(0: every constraint met; inf: none imposed)", "temperature": "power of the likelihood (1: the posterior)",
        "ess": "effective sample size of the reweighted particles before resampling", "acceptance":
        "share of move proposals accepted (blank when no move was needed)", "steps": "move steps taken",
        "simulations": "spin-ups spent so far, pilot draws included"}),
    "calibration/predictive.csv": ("Monitoring data against the posterior predictive bands (replicate data, one "
                                   "per member).", {
        "species": "monitored species", "time": "time of the observation (0 = today, negative = before)",
        "observed": "the count or index observed", "kind": "count or index", "q05": "5 % quantile of replicates",
        "q25": "25 % quantile", "q50": "median", "q75": "75 % quantile", "q95": "95 % quantile"}),
    "structures/weights.csv": ("Cases with structural doubts: every web they make, with its prior weight and its "
                               "weight among the members (after the data and constraints).", {
        "structure": "the web (its choices, or its name in [[webs]])", "choices": "the choice made for each doubt, "
        "joined by \"; \"", "prior_weight": "prior weight", "weight": "share of the members in this web",
        "low": "lower limit (Monte Carlo error)", "high": "upper limit", "interval": _CI, "level": _LEVEL,
        "members": "members in this web", "n_effective": "members counted as independent for the interval "
        "(the smallest effective sample size of the SMC generations; all members for independent draws)",
        "evidence": "keeps its prior weight, or more / less likely than its prior (only when the interval "
        "excludes the prior weight)"}),
    "structures/choices.csv": ("Cases with structural doubts: every choice of every doubt, with its prior weight and "
                               "its weight among the members.", {
        "doubt": "the doubt's name", "choice": "the choice in plain words", "absent": "True for the web without "
        "the interaction", "prior_weight": "prior weight", "weight": "share of the members making this choice",
        "low": "lower limit (Monte Carlo error)", "high": "upper limit", "interval": _CI, "level": _LEVEL,
        "members": "members making this choice", "n_effective": "as in weights.csv", "evidence": "as in weights.csv"}),
}
for _rel in ("risk.csv", "effects.csv", "objectives.csv", "comparisons.csv", "dynamics/regime_shares.csv"):
    DICTIONARY[f"structures/{_rel.split('/')[-1]}"] = (f"Cases with structural doubts: {_rel} computed on each web's members alone.",
                                        {"structure": "the web", **DICTIONARY[_rel][1]})
del _rel


def documented_columns(rel: str, written: list[str]) -> tuple[set[str], set[str]]:
    """Columns of ``written`` that the dictionary does not cover, and documented columns not written."""
    cols = DICTIONARY[rel][1]
    fixed = {c for c in cols if "*" not in c}
    prefixes = [c[:-1] for c in cols if c.endswith("*") and c != "*"]
    free = "*" in cols
    undocumented = {c for c in written if c not in fixed and not any(c.startswith(p) for p in prefixes) and not free}
    return undocumented, fixed - set(written)


def dictionary_markdown(files: list[str]) -> str:
    """README.md of a results folder: the files present, each with its columns."""
    out = ["# Results folder written by impact", "",
           "Every number in report.pdf is read from these files. Invented example cases say so in manifest.json.",
           "", "* `manifest.json`: what was run, on what, with which versions; the case's species, options, "
           "objectives and judgement levels; counts of draws, kept and failed members.",
           "* `summary.txt`: the terminal summary, ending with the same verdict as page 1 of report.pdf.",
           "* `report.pdf`: the assessment document.", ""]
    for rel in files:
        if rel not in DICTIONARY:
            continue
        what, cols = DICTIONARY[rel]
        out += [f"## `{rel}`", "", what, "", "| column | meaning |", "|---|---|"]
        out += [f"| `{c}` | {m} |" for c, m in cols.items()]
        out.append("")
    return "\n".join(out)


def write_dictionary(folder: Path) -> None:
    """Write README.md into a results folder, for the tables it holds."""
    folder = Path(folder)
    files = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*.csv"))
    (folder / "README.md").write_text(dictionary_markdown(files), encoding="utf-8")


def check_folder(folder: Path) -> list[str]:
    """Problems between the dictionary and a written folder (empty when they agree)."""
    folder = Path(folder)
    problems = []
    for p in sorted(folder.rglob("*.csv")):
        rel = p.relative_to(folder).as_posix()
        if rel not in DICTIONARY:
            problems.append(f"{rel}: not in the data dictionary")
            continue
        undocumented, missing = documented_columns(rel, list(pd.read_csv(p, nrows=0).columns))
        problems += [f"{rel}: column {c!r} written but not documented" for c in sorted(undocumented)]
        problems += [f"{rel}: column {c!r} documented but not written" for c in sorted(missing)]
    return problems
