"""Monitoring files named by a case, read as untrusted input: every refusal names the file, the line
and the column, exit status 2, nothing written, and no file outside the case's folder is quoted.

The contract is the project's own (README, "Monitoring data and calibration"); no published source.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).resolve().parent))
from casefiles import write_case  # noqa: E402
from test_monitoring import growth_case  # noqa: E402

from impact.case import load_case  # noqa: E402
from impact.errors import CaseError  # noqa: E402
from impact.case.seriesfile import DATA_PATH_VARIABLE, MAX_BYTES  # noqa: E402


def file_case(tmp_path: Path, name: str = "newts.csv", kind: str = "count") -> Path:
    d = growth_case(60)
    del d["monitoring"][0]["times"], d["monitoring"][0]["values"]
    d["monitoring"][0]["file"] = name
    if kind == "index":
        d["monitoring"][0].update(kind="index", error="lognormal", log_sd=0.3)
        del d["monitoring"][0]["dispersion"], d["monitoring"][0]["detection"]
    return write_case(tmp_path, d)


GOOD = "time,value\n-8,90\n-6,110\n-4,150\n-2,160\n0,200\n"
BAD = [  # content, the field the refusal names, words of its message
    (b"", "line 1", "is empty"),
    (b"# only a comment\n", "line 1", "is empty"),
    (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "line 1, column 1", "not UTF-8"),
    (b"time,value\n-8,90\n\x00\x01\x02", "line 3", "NUL byte"),
    ("time,value\n-8,90\n-6,caf\u00e9\n".encode("latin-1"), "line 3, column 7", "not UTF-8"),
    (b"time\n-8\n-6\n", "line 1, column 2", "time,value"),
    (b"value,time\n90,-8\n", "line 1, column 1", "time,value"),
    (b"time,value\n-8,90\n-6,many\n", "line 3, column value", "must be a number"),
    (b"time,value\n-8,90\n-6,-4\n", "line 3, column value", "whole numbers >= 0"),
    (b"time,value\n-8,90\n-6,12.5\n", "line 3, column value", "whole numbers >= 0"),
    (b"time,value\n-8,90\n-6,nan\n", "line 3, column value", "finite"),
    (b"time,value\n-8,90\ninf,100\n", "line 3, column time", "finite"),
    (b"time,value\n-8,90\n-8,100\n", "line 3, column time", "strictly increasing"),
    (b"time,value\n-6,90\n-8,100\n", "line 3, column time", "strictly increasing"),
    (b"time,value\n# note\n-30,90\n-8,100\n", "line 3, column time", "[-20, 0]"),
    (b"time,value\n-8,90\n2,100\n", "line 3, column time", "[-20, 0]"),
    (b"time,value\n-8,90\n-6,90,1\n", "line 3", "2 cells"),
    (b"time,value\n-8,90\n-6,\"" + b"9" * 200_000 + b"\"\n", "line 3", "not a CSV row"),
    (b"time,value\n-8,90\n", "monitoring.newt.file", "at least two"),
]


@pytest.mark.parametrize("content, field, words", BAD, ids=[f"bad{k}" for k in range(len(BAD))])
def test_a_bad_monitoring_file_is_refused_naming_file_line_and_column(tmp_path, content, field, words):
    (tmp_path / "newts.csv").write_bytes(content)
    with pytest.raises(CaseError) as err:
        load_case(file_case(tmp_path))
    where = str(tmp_path / ("case.toml" if field.startswith("monitoring") else "newts.csv"))
    assert (err.value.file, err.value.field) == (where, field)
    assert words in err.value.message
    assert len(str(err.value)) < 600  # a huge cell is not quoted whole


def test_an_index_of_zero_is_refused_on_its_line(tmp_path):
    (tmp_path / "index.csv").write_text("time,value\n-8,1.5\n-4,0\n")
    with pytest.raises(CaseError) as err:
        load_case(file_case(tmp_path, "index.csv", kind="index"))
    assert err.value.field == "line 3, column value" and "> 0" in err.value.message


def test_a_good_file_with_a_byte_order_mark_and_comments_is_read(tmp_path):
    (tmp_path / "newts.csv").write_bytes(b"\xef\xbb\xbf# invented counts\n" + GOOD.encode())
    series = load_case(file_case(tmp_path)).monitoring[0]
    assert series.times == (-8.0, -6.0, -4.0, -2.0, 0.0) and series.values[-1] == 200.0


def test_paths_leaving_the_case_folder_are_refused_without_quoting_them(tmp_path, monkeypatch):
    outside = tmp_path / "outside"
    outside.mkdir()
    secret = "SECRET-FIRST-LINE,1"
    (outside / "data.csv").write_text(secret + "\n")
    case_dir = tmp_path / "case"
    case_dir.mkdir()
    monkeypatch.delenv(DATA_PATH_VARIABLE, raising=False)
    for name in ("../outside/data.csv", str(outside / "data.csv"), "../../../../../../etc/passwd"):
        with pytest.raises(CaseError) as err:
            load_case(file_case(case_dir, name))
        assert err.value.field == "monitoring.newt.file" and "leaves the case file's folder" in err.value.message
        assert "SECRET" not in str(err.value) and "root:" not in str(err.value)
    # a symbolic link inside the folder that points outside is outside too
    (case_dir / "link.csv").symlink_to(outside / "data.csv")
    with pytest.raises(CaseError, match="leaves the case file's folder"):
        load_case(file_case(case_dir, "link.csv"))
    # the documented option: the folder listed in IMPACT_DATA_PATH may be read (and this file is refused
    # for its content, now that it may be quoted)
    monkeypatch.setenv(DATA_PATH_VARIABLE, str(outside))
    with pytest.raises(CaseError) as err:
        load_case(file_case(case_dir, "../outside/data.csv"))
    assert err.value.field == "line 1, column 1"
    (outside / "data.csv").write_text(GOOD)
    assert load_case(file_case(case_dir, "../outside/data.csv")).monitoring[0].values[0] == 90.0


def test_a_folder_a_link_loop_a_pipe_and_a_huge_file_are_refused_before_reading(tmp_path):
    (tmp_path / "folder.csv").mkdir()
    (tmp_path / "loop.csv").symlink_to(tmp_path / "loop2.csv")
    (tmp_path / "loop2.csv").symlink_to(tmp_path / "loop.csv")
    os.mkfifo(tmp_path / "pipe.csv")  # reading it would wait for ever
    with open(tmp_path / "huge.csv", "wb") as fh:
        fh.truncate(MAX_BYTES + 1)  # sparse: no disk space used
    for name, words in (("folder.csv", "is a folder"), ("loop.csv", "symbolic-link loop"),
                        ("pipe.csv", "not a regular file"), ("huge.csv", "more than the 16 MiB")):
        with pytest.raises(CaseError) as err:
            load_case(file_case(tmp_path, name))
        assert err.value.field == "monitoring.newt.file" and words in err.value.message, name


def test_the_command_line_exits_2_with_one_line_and_writes_nothing(tmp_path, capsys):
    from impact.cli import main

    case_dir = tmp_path / "case"
    case_dir.mkdir()
    (case_dir / "newts.csv").write_text("time,value\n-8,90\n-6,\n")
    f = file_case(case_dir)
    out = tmp_path / "out"
    assert main(["assess", str(f), "--out", str(out), "--quiet", "--workers", "1", "--no-report"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "newts.csv: line 3, column value" in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case"]  # nothing written, no lock, no checkpoints


# Property: any bytes at all in the monitoring file either give a series the rest of impact can use
# (finite, strictly increasing times within the spin-up, whole counts >= 0) or a CaseError naming the
# monitoring file and a line (the case file for a series too short); never another exception.
# 300 examples a run (hypothesis' default database off, so each run draws afresh).
cells = st.one_of(st.integers(-30, 300).map(str), st.floats(allow_nan=True, allow_infinity=True).map(repr),
                  st.text(max_size=6), st.sampled_from(["", " ", "nan", "1e999", "-0", "+5", "0x10", '"3"']))
rows = st.lists(st.lists(cells, min_size=1, max_size=3).map(",".join), max_size=8)
contents = st.one_of(
    st.binary(max_size=200),
    rows.map(lambda r: "\n".join(["time,value", *r]).encode()),
    rows.map(lambda r: "\n".join(["# invented", "time,value", *r]).encode("utf-8", "surrogatepass")),
    st.lists(st.integers(-20, 0), min_size=2, max_size=6, unique=True).map(
        lambda ts: ("time,value\n" + "".join(f"{t},{abs(t) * 3}\n" for t in sorted(ts))).encode()),
)


@settings(max_examples=300, deadline=None, database=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(content=contents)
def test_property_any_monitoring_file_is_read_or_refused_naming_its_line(tmp_path, content):
    (tmp_path / "newts.csv").write_bytes(content)
    case = file_case(tmp_path)
    try:
        series = load_case(case).monitoring[0]
    except CaseError as exc:
        if exc.file == str(case):
            assert exc.field == "monitoring.newt.file", exc
        else:
            assert exc.file == str(tmp_path / "newts.csv") and exc.field.startswith("line "), exc
        return
    times, values = series.times, series.values
    assert len(times) == len(values) >= 2
    assert all(-20 <= t <= 0 for t in times) and all(b > a for a, b in zip(times, times[1:]))
    assert all(v >= 0 and v == int(v) for v in values)
