"""A case whose every number is fixed (no uncertain parameter) assesses, and empty results tables
keep their header.

Such a case still varies from member to member through its chance events (here an eradication
that fails with a fixed probability), so risks and effects have intervals; the Sobol screen and
what the decision hinges on need uncertain parameters and are skipped with their reason.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from casefiles import mesopredator_case, write_case
from impact.cli import main
from impact.store.results import TABLES, load_results, read_table, write_csv

FAILURE = 0.3  # the apex removal fails in this share of members


def fixed_case() -> dict:
    data = mesopredator_case(members=60)
    del data["parameters"]
    data["interactions"][0]["attack_rate"] = 0.02  # the nominal value of the prior it replaces
    data["interventions"][0]["failure_probability"] = FAILURE
    data["interventions"][0]["residual_fraction"] = 1.0  # a failed removal leaves the apex as it was
    data["risk"]["min_members"] = 20
    return data


@pytest.fixture(scope="module")
def assessed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fixed")
    out = folder / "out"
    code = main(["assess", str(write_case(folder, fixed_case())), "--out", str(out), "--quiet", "--workers", "1"])
    return code, out


def test_a_fully_fixed_case_runs_every_stage_that_applies(assessed):
    code, out = assessed
    assert code == 0
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    # the press signs need no uncertain number (the structure alone, and the one member's own response)
    assert manifest["stages"] == ["assess", "press", "dynamics"]
    assert (out / "press_signs.csv").exists()
    # the screen and the value of information need uncertain numbers: skipped, with the reason recorded
    assert "0 uncertain parameter" in manifest["sensitivity"]["skipped"]
    assert (out / "report.pdf").stat().st_size > 0 and (out / "dynamics" / "regimes.csv").exists()


def test_its_priors_table_has_a_header_and_no_rows(assessed):
    _, out = assessed
    lines = (out / "priors.csv").read_text(encoding="utf-8").splitlines()
    assert lines[0].split(",")[: len(TABLES["priors.csv"][0])] == list(TABLES["priors.csv"][0]) and len(lines) == 1
    res = load_results(out)
    assert res.priors.empty and list(res.priors.columns[:6]) == list(TABLES["priors.csv"][0])


def test_its_chance_event_alone_spreads_the_members(assessed):
    # every member has the same parameters; only the eradication's failure differs, so the apex is gone
    # in about 1 − FAILURE of the members under the option (a failed removal leaves it at its resting level,
    # far above its quasi-extinction level): 60 Bernoulli draws, within 4 binomial SDs (false failure < 1e-4)
    _, out = assessed
    risk = load_results(out).risk
    row = risk[(risk.option == "apex only") & (risk.species == "apex") & (risk.metric == "quasi_extinction")
               & np.isclose(risk.horizon, 40.0)].iloc[0]
    assert abs(row.value - (1 - FAILURE)) <= 4 * np.sqrt(FAILURE * (1 - FAILURE) / 60)
    assert row.low < row.value < row.high


@pytest.mark.parametrize("relative", sorted(TABLES))
def test_every_empty_results_table_is_written_with_its_header_and_read_back_empty(tmp_path, relative):
    # a stage with nothing to list may hand the writer a frame without columns (pandas writes a bare
    # newline for it, which no CSV reader accepts) or one with columns and no rows
    required = list(TABLES[relative][0])
    for frame in (pd.DataFrame(), pd.DataFrame(columns=required)):
        path = tmp_path / relative
        write_csv(frame, path)
        assert path.read_text(encoding="utf-8") == ",".join(required) + "\n"
        back = read_table(path)
        assert back.empty and list(back.columns) == required
