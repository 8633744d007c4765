"""Page 1's eradication sentences agree with eradication.csv, and summary.txt says the same."""

from __future__ import annotations

import re

import numpy as np
import pytest

import impact
from casefiles import decline_case, write_case
from impact.dossier.eradication_reading import eradication_sentences, reading_risk_time
from impact.dossier.formatting import fmt_bare_prob, fmt_num, fmt_prob
from impact.dossier.render import report_html
from impact.store.results import load_results


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("eradication")
    data = decline_case(120)
    data["parameters"]["p"] = {"distribution": "uniform", "low": 0.3, "high": 0.6, "unit": "probability"}
    data["interventions"].append({"name": "short harvest", "kind": "press-harvest", "species": "newt",
                                  "rate": 0.3, "start": 0.0, "end": 12.0})
    data["options"].append({"name": "short", "interventions": ["short harvest"]})
    data["surveillance"] = [{"species": "newt", "gone_below": 1.0, "detection": "p", "arrival_rate": 0.05,
                             "establishment": 0.5, "survey": "night count"}]
    result = impact.assess(str(write_case(tmp, data)), seed=0, sensitivity=False, dynamics=False)
    return impact.save(result, tmp / "out", report=False)


def _plain(html: str) -> str:
    return " ".join(re.sub(r"<[^>]+>", "", html).replace("&nbsp;", "\u00a0").split())


def test_the_new_tables_are_in_the_data_dictionary(folder):
    from impact.store.dictionary import check_folder

    assert (folder / "eradication.csv").is_file() and (folder / "eradication_members.csv").is_file()
    assert check_folder(folder) == []


def test_page_one_states_the_table_numbers(folder):
    res = load_results(folder)
    m, table = res.manifest, res.eradication
    (sentence,) = eradication_sentences(m, table)  # one surveyed species; doing nothing is not named
    row = table.iloc[0]
    assert f"below {fmt_num(row.gone_below)} {row.unit}" in sentence
    assert f"detection {fmt_num(table.detection_mean.iloc[0])} per survey, mean over members" in sentence
    for option in ("harvest", "short"):
        h = reading_risk_time(m, option, "newt")
        # the first risk horizon at or after the option's last intervention ends (40 and 12 -> 40, 20)
        assert h == {"harvest": 40.0, "short": 20.0}[option]
        row = table[(table.option == option) & np.isclose(table.horizon, h)].iloc[0]
        assert (f"by year\u00a0{fmt_num(h)} {fmt_prob(row.chance_success)} [{fmt_bare_prob(row.success_low)}, "
                f"{fmt_bare_prob(row.success_high)}]") in sentence
        needed = ("none up to 1000" if np.isnan(row.surveys_needed)
                  else f"{fmt_num(row.surveys_needed)} from year {fmt_num(h)}")
        assert f"{needed} under “{option}”" in sentence
        last = table[(table.option == option) & np.isclose(table.horizon, 40.0)].iloc[0]
        assert f"{fmt_prob(last.chance_reinvaded)} under “{option}”" in sentence
    page = _plain(report_html(res)[0].split('<nav class="toc">')[0])  # the cover section: page 1
    summary = " ".join((folder / "summary.txt").read_text(encoding="utf-8").split())
    assert " ".join(sentence.split()) in page
    assert " ".join(sentence.split()) in summary
