"""The Python interface: an assessment from Python equals the command line's, table for table."""

from __future__ import annotations


from pathlib import Path

import pandas as pd
import pytest

import impact.api as impact
from casefiles import mesopredator_case, write_case
from impact.cli import main


def page_one(pdf) -> str:
    """The text of a report's first page, its inventory hash masked."""
    import re

    from pypdf import PdfReader

    return re.sub(r"(inventory\s+SHA-256\s*)[0-9a-f]{64}", r"\1(hash)", PdfReader(str(pdf)).pages[0].extract_text())


def test_api_round_trip_matches_the_command_line(tmp_path):
    from pypdf import PdfReader

    path = write_case(tmp_path, mesopredator_case(members=120))
    case = impact.load_case(path)
    result = impact.assess(case, impact.AssessSettings(dynamics=False, base_samples=16))
    assert not result.thin and set(result.effects.option) == {"apex only", "apex and meso"}
    assert "side effect: meso (indirect" in impact.summary_text(case, impact.save(result, tmp_path / "api"))

    cli_out = tmp_path / "cli"
    assert main(["assess", str(path), "--out", str(cli_out), "--quiet", "--workers", "1", "--no-dynamics",
                 "--base-samples", "16"]) == 0
    api_out = tmp_path / "api"
    tables = sorted(p.relative_to(cli_out).as_posix() for p in cli_out.rglob("*.csv"))
    assert "effects.csv" in tables and "sensitivity/information.csv" in tables
    for rel in tables:
        assert (api_out / rel).read_bytes() == (cli_out / rel).read_bytes(), rel
    loaded = impact.load(api_out)
    pd.testing.assert_frame_equal(loaded.effects, impact.load(cli_out).effects)
    # page 1 states each folder's own inventory hash (their manifests record different command lines)
    first = [page_one(d / "report.pdf") for d in (api_out, cli_out)]
    assert first[0] == first[1]
    rebuilt = impact.build_report(api_out, tmp_path / "again.pdf")
    assert page_one(rebuilt) == first[0]
    assert (api_out / "summary.txt").read_text().split("verdict")[1] == (cli_out / "summary.txt").read_text().split("verdict")[1]
    # the manifest is typed, written and read in one place: what was saved is what is read back
    assert loaded.manifest == result.manifest
    assert loaded.manifest.counts.kept == 120 and loaded.manifest.option_names == ["apex only", "apex and meso"]


def test_a_manifest_entry_of_the_wrong_type_is_named(tmp_path):
    import json

    from impact.errors import ReadError
    from impact.store.manifest import Manifest

    path = write_case(tmp_path, mesopredator_case(members=100))
    result = impact.assess(impact.load_case(path), impact.AssessSettings(sensitivity=False, dynamics=False))
    data = json.loads(json.dumps(result.manifest.to_json()))
    assert Manifest.from_json(data) == result.manifest
    data["species"][1]["role"] = 3
    try:
        Manifest.from_json(data, "x/manifest.json")
    except ReadError as exc:
        assert exc.field == "species[1].role" and "text" in exc.message
    else:
        raise AssertionError("a wrong type was read")
    del data["species"][1]["role"]
    try:
        Manifest.from_json(data, "x/manifest.json")
    except ReadError as exc:
        assert exc.field == "species[1].role" and "missing" in exc.message
    else:
        raise AssertionError("a missing field was read")


def test_every_written_column_is_documented_and_every_documented_column_written(tmp_path):
    from impact.store.dictionary import DICTIONARY, check_folder

    path = write_case(tmp_path, mesopredator_case(members=100))
    out = tmp_path / "out"
    assert main(["assess", str(path), "--out", str(out), "--quiet", "--workers", "1", "--base-samples", "16",
                 "--no-report"]) == 0
    assert check_folder(out) == []
    readme = (out / "README.md").read_text()
    for rel in ("risk.csv", "effects.csv", "sensitivity/information.csv", "dynamics/regimes.csv"):
        assert f"## `{rel}`" in readme
        for col in DICTIONARY[rel][1]:
            assert f"| `{col}` |" in readme


def test_the_terminal_summary_prints_no_nan_for_an_introduced_species(tmp_path):
    """A species absent today (released by an option) has no paired change: the summary says so
    instead of printing "nan"."""
    from pathlib import Path

    case = Path(__file__).resolve().parents[2] / "casework" / "orchard_biocontrol.toml"
    out = tmp_path / "out"
    assert main(["assess", str(case), "--out", str(out), "--quiet", "--workers", "1", "--members", "100",
                 "--no-sensitivity", "--no-dynamics", "--no-report"]) == 0
    text = (out / "summary.txt").read_text()
    assert "nan" not in text.lower() and "absent today: wasp" in text


def test_the_module_example_of_the_interface_runs(tmp_path, monkeypatch):
    # impact.api's docstring is the README's first Python example: it must run as written
    import doctest
    import shutil

    import impact.api

    shutil.copytree(Path(__file__).resolve().parents[2] / "casework", tmp_path / "casework")
    monkeypatch.chdir(tmp_path)
    outcome = doctest.testmod(impact.api, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert outcome.attempted >= 7 and outcome.failed == 0


def test_the_package_exposes_the_verbs_and_one_error_base():
    import impact
    import impact.api
    from impact.errors import CaseError, ImpactError, ReadError, SettingError, WriteError

    assert set(impact.__all__) >= {"assess", "calibrate", "load", "save", "report", "ImpactError"}
    assert impact.assess is impact.api.assess and impact.report is impact.api.report
    assert set(impact.api.__all__) <= set(dir(impact.api)) and "np" not in impact.api.__all__
    assert all(issubclass(e, ImpactError) for e in (CaseError, ReadError, SettingError, WriteError))


def test_assess_takes_a_path_and_keywords_and_names_a_wrong_case(tmp_path):
    import impact
    from impact.errors import SettingError

    path = write_case(tmp_path, mesopredator_case(members=60))
    result = impact.assess(str(path), members=40, seed=0, sensitivity=False, dynamics=False)
    assert result.manifest.counts.kept == 40 and result.manifest.seed == 0
    with pytest.raises(SettingError) as err:
        impact.assess(42)
    assert err.value.parameter == "case"
