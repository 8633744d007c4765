"""The verdict page: calibrated words, indirect effects, thin runs, and numbers that match the tables."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from casefiles import mesopredator_case, write_case
from impact.cli import EXIT_NO_VERDICT, main
from impact.dossier.formatting import fmt_bare_points, fmt_bare_prob, fmt_change, fmt_points, fmt_prob
from impact.dossier.likelihood import likelihood_term
from impact.dossier import iucn_rows, load_results
from impact.dossier.verdict import reading

DEMO = Path(__file__).resolve().parents[2] / "casework" / "island_mesopredator.toml"


# Mastrandrea et al. (2010), IPCC guidance note, Table 1 (from memory): virtually certain 99–100 %, very likely
# 90–100 %, likely 66–100 %, about as likely as not 33–66 %, unlikely 0–33 %, very unlikely 0–10 %,
# exceptionally unlikely 0–1 %; the most specific term wins.
@pytest.mark.parametrize("p, term", [
    (1.0, "virtually certain"), (0.99, "virtually certain"), (0.9899, "very likely"), (0.90, "very likely"),
    (0.8999, "likely"), (0.66, "likely"), (0.6599, "about as likely as not"), (0.5, "about as likely as not"),
    (0.3301, "about as likely as not"), (0.33, "unlikely"), (0.1001, "unlikely"), (0.10, "very unlikely"),
    (0.0101, "very unlikely"), (0.01, "exceptionally unlikely"), (0.0, "exceptionally unlikely"),
])
def test_likelihood_terms_follow_the_published_scale(p, term):
    assert likelihood_term(p) == term


def test_likelihood_term_refuses_a_non_probability():
    with pytest.raises(ValueError):
        likelihood_term(1.2)
    assert likelihood_term(float("nan")) == "not estimated"


def _assess(tmp_path, data, *flags):
    f = write_case(tmp_path, data)
    out = tmp_path / "out"
    code = main(["assess", str(f), "--out", str(out), "--quiet", "--workers", "1", "--no-sensitivity",
                 "--no-dynamics", *flags])
    return code, out


@pytest.fixture(scope="module")
def meso_results(tmp_path_factory):
    code, out = _assess(tmp_path_factory.mktemp("meso"), mesopredator_case(members=150), "--no-report")
    assert code == 0
    return load_results(out)


def _reading(res):
    return reading(res.manifest, res.risk, res.effects, res.objectives, res.comparisons)


def test_verdict_names_the_released_mesopredator_as_an_indirect_side_effect(meso_results):
    # mesopredator release (Courchamp, Langlais & Sugihara 1999; Crooks & Soulé 1999), read off the verdict
    r = _reading(meso_results)
    apex_only = next(o for o in r.options if o.option == "apex only")
    heads = [x.head for x in apex_only.side_effects]
    assert heads[0].startswith("meso (indirect")  # the largest change comes first
    # the protected bird is read first, in its own list, before the targets and the other species
    assert [x.head for x in apex_only.protected] == ["bird (protected, indirect: through the food web)"]
    bird, meso = apex_only.protected[0], next(x for x in apex_only.side_effects if x.head.startswith("meso"))
    assert meso.body.startswith("mean abundance") and " +" in meso.body.split("(")[0]
    assert " -" in bird.body.split("(")[0]
    # the target is an outcome, never a side effect, and gets no IUCN reading
    assert [x.head for x in apex_only.targets] == ["apex (target)"]
    assert not any(h.startswith("apex") for h in heads)
    assert all(row["species"] != "apex" for row in iucn_rows(meso_results))


def test_removing_both_predators_is_read_as_raising_the_bird(meso_results):
    r = _reading(meso_results)
    both = next(o for o in r.options if o.option == "apex and meso")
    assert " +" in both.protected[0].body.split("(")[0]
    assert "apex and meso" in r.bottom.meets_all and "apex only" not in r.bottom.meets_all


def test_every_bullet_reads_a_species_at_the_one_horizon_rule(meso_results):
    """The horizon rule: a species an objective concerns at that objective's horizon, the others at the
    case's last horizon; a bullet quoting any other horizon says why (common practice, no source)."""
    from impact.dossier.formatting import fmt_num
    from impact.dossier.verdict import species_risk_time

    m = meso_results.manifest
    r = _reading(meso_results)
    for o in r.options:
        for x in (*o.protected, *o.targets, *o.side_effects):
            sp = x.head.split(" (")[0]
            h = fmt_num(species_risk_time(m, sp)[0])
            quoted = set(re.findall(r"(?:by year|over years 0–)\u00a0?(\d[\d.]*)", x.body))
            assert h in quoted, (sp, x.body)
            if quoted - {h}:
                assert "quoted" in x.body, (sp, x.body)


def test_a_thin_run_gives_no_verdict_but_keeps_the_tables(tmp_path, capsys):
    code, out = _assess(tmp_path, mesopredator_case(members=40))
    assert code == EXIT_NO_VERDICT == 3
    text = capsys.readouterr().out
    assert "NO VERDICT: only 40 plausible members" in text and "side effect:" not in text
    risk = pd.read_csv(out / "risk.csv")
    assert len(risk) and np.isfinite(risk.value).any()
    assert len(pd.read_csv(out / "effects.csv"))
    from pypdf import PdfReader

    first = PdfReader(str(out / "report.pdf")).pages[0].extract_text()
    assert "NO VERDICT" in first and "What each option does" not in first


def _printed_forms(folder: Path) -> set[str]:
    """Every way a saved number may be printed, over every numeric cell of the tables behind page 1."""
    forms = set()
    for name in ("risk", "effects", "objectives", "comparisons"):
        df = pd.read_csv(folder / f"{name}.csv")
        for col in ("value", "low", "high", "bound"):
            if col not in df:
                continue
            for v in df[col].dropna().to_numpy(float):
                forms.update({fmt_prob(v), fmt_bare_prob(v), fmt_points(v), fmt_bare_points(v), fmt_change(v)})
                if col == "bound":  # a requirement's bound is a size, printed unsigned
                    forms.add(fmt_points(v).lstrip("+"))
    if (folder / "eradication.csv").exists():  # a case with [[surveillance]] states its eradication on page 1
        df = pd.read_csv(folder / "eradication.csv")
        for v in df[["chance_success", "success_low", "success_high", "chance_reinvaded", "confidence"]].to_numpy(
                float).ravel():
            forms.update({fmt_prob(v), fmt_bare_prob(v)})
    for name in ("weights", "choices"):  # a case with structural doubts quotes the webs' weights too
        path = folder / "structures" / f"{name}.csv"
        if path.exists():
            df = pd.read_csv(path)
            for v in df[["prior_weight", "weight", "low", "high"]].to_numpy(float).ravel():
                forms.update({fmt_prob(v), fmt_bare_prob(v)})
    return {f.replace("\u00a0", " ") for f in forms}


def test_every_probability_on_page_one_is_in_the_tables(tmp_path):
    out = tmp_path / "demo"
    code = main(["assess", str(DEMO), "--out", str(out), "--quiet", "--workers", "1", "--members", "120",
                 "--no-sensitivity", "--no-dynamics"])
    assert code == 0
    from pypdf import PdfReader

    pages = [p.extract_text() for p in PdfReader(str(out / "report.pdf")).pages]
    # the running footer falls inside a sentence that continues on the next page
    pages = [re.sub(r"Screening aid — not a decision|page \d+ of \d+|•", " ", t) for t in pages]
    end = next(i for i, t in enumerate(pages) if "Contents" in t)
    text = " ".join(pages[:end + 1]).split("Contents")[0].replace("\u00a0", " ")
    # the reading guide quotes the scale's fixed edges; the facts and the case's own words close the page
    before, guide = text.split("How to read this page")
    text = before + " What each option does " + guide.split("What each option does", 1)[1].split("Analyst")[0]
    text = re.sub(r"\s+", " ", text)  # line breaks of the PDF layout
    assert "What each option does" in text and "rat (indirect" in text
    forms = _printed_forms(out)
    tokens = re.findall(r"[+-]?\d[\d,]*\.\d (?:%|points)", text)
    tokens += [t for br in re.findall(r"\[([^\]]+)\]", text) for t in br.split(", ")]
    tokens += re.findall(r"[+-]\d[\d,]* %", text)
    assert len(tokens) > 30
    missing = [t for t in tokens if t.strip() not in forms]
    assert not missing, f"page-1 numbers not found in the tables: {missing[:10]}"


@pytest.mark.slow
def test_a_protected_species_is_listed_above_a_one_in_ten_chance_of_a_material_change(tmp_path):
    """The listing rule read off every option of the invented pollinator case: a protected species
    is named as a side effect once its chance of a material change exceeds 10 % (more than "very
    unlikely"), any other species above 33 %; the quiet list holds only the rest. (The levels are
    the IPCC scale's boundaries, Mastrandrea et al. 2010; the stricter level for protected species
    is common practice, no source.)"""
    case = Path(__file__).resolve().parents[2] / "casework" / "moth_pollinator.toml"
    out = tmp_path / "out"
    assert main(["assess", str(case), "--out", str(out), "--quiet", "--workers", "1", "--members", "150",
                 "--no-sensitivity", "--no-dynamics", "--no-report"]) == 0
    res = load_results(out)
    roles = res.manifest.roles
    r = _reading(res)
    for o in r.options:
        e = res.effects[(res.effects.option == o.option) & (res.effects.metric == "mean_abundance")
                        & (res.effects.statistic == "p_material")]
        listed = {x.head.split(" (")[0] for x in (*o.side_effects, *o.protected)}
        for sp, g in e.groupby("species"):
            if roles[sp] == "target":
                continue
            top = g.value.astype(float).max()
            level = 0.10 if roles[sp] == "protected" else 0.33
            if top > level:
                assert sp in listed, (o.option, sp, top)


@pytest.mark.slow
def test_a_seasonal_case_warns_that_the_regime_screen_sees_the_averaged_web(tmp_path):
    """The regime screen of a case with seasons runs the season-averaged web; the warnings must
    say so, since the forced web can cycle where the averaged one settles."""
    from impact.dossier.cautions import cautions
    from impact.dossier.verdict import thin_run

    case = Path(__file__).resolve().parents[2] / "casework" / "moth_pollinator.toml"
    out = tmp_path / "out"
    assert main(["assess", str(case), "--out", str(out), "--quiet", "--workers", "1", "--members", "8",
                 "--no-sensitivity", "--no-report"]) in (0, EXIT_NO_VERDICT)
    res = load_results(out)
    texts = [w.text for w in cautions(res.manifest, res.objectives, thin_run(res.manifest)[1], res.dynamics,
                                      res.sensitivity, res.calibration)]
    assert any("season-averaged web" in t for t in texts), texts


def test_an_index_is_printed_to_two_places_and_never_as_minus_zero():
    from impact.dossier.formatting import fmt_index

    assert fmt_index(-0.001) == "0.00" and fmt_index(0.256) == "0.26" and fmt_index(-0.03) == "-0.03"
    assert fmt_index(float("nan")) == "n/a"


@pytest.mark.parametrize("chance, named", [(0.2, True), (0.0, False)])
def test_a_protected_species_that_could_die_out_by_chance_is_named_as_such(meso_results, chance, named):
    # a species counted in individuals has an 'extinct' row (zero individuals) in risk.csv; when its chance
    # under an option reaches the material risk, page 1 names the loss as one by chance at low numbers
    res = meso_results
    rows = [dict(option=o, species="bird", metric="extinct", horizon=h, value=chance if o == "apex only" else 0.0,
                 low=0.0, high=min(1.0, chance + 0.05), interval="clopper_pearson", level=0.95, unit="probability",
                 n=150) for o in ("baseline", "apex only", "apex and meso") for h in res.manifest.horizons]
    risk = pd.concat([res.risk, pd.DataFrame(rows)], ignore_index=True)
    r = reading(res.manifest, risk, res.effects, res.objectives, res.comparisons)
    bird = next(o for o in r.options if o.option == "apex only").protected[0]
    assert ("could be lost by chance at low numbers" in bird.body) is named
    if named:
        assert f"{fmt_prob(chance)} [" in bird.body and "doing nothing 0" in bird.body
