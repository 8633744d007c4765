"""A parameter that declares no unit, where its field has one, is warned about (never refused)."""

from casefiles import web_case, write_case

from impact.case import load_case
from impact.case.units import unit_warnings


def test_a_missing_unit_on_a_dimensioned_field_is_a_warning_naming_the_field(tmp_path):
    data = web_case()
    del data["parameters"]["grass_r"]["unit"]  # a growth rate: per year in this case
    data["parameters"]["cull"]["unit"] = ""  # a cull fraction has no dimension: no unit is fine
    (warning,) = unit_warnings(load_case(write_case(tmp_path, data)))
    assert warning.startswith("parameters.grass_r.unit: ")
    assert "missing" in warning and "per year" in warning and "species.grass.growth_rate" in warning


def test_every_casework_case_declares_its_units():
    from pathlib import Path

    for path in sorted((Path(__file__).resolve().parents[2] / "casework").glob("*.toml")):
        assert unit_warnings(load_case(path)) == (), path.name
