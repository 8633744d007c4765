"""A full disk while checkpoints or results are written: a clear error naming the folder, nothing
half-written left as results, the user's files untouched, and `--resume` completing the run with the
same tables. The disk is filled by an injected ENOSPC in the writer (the project's contract; no source).
"""

from __future__ import annotations

import errno
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from casefiles import decline_case, write_case  # noqa: E402

import impact.results  # noqa: E402
from impact.cli import main  # noqa: E402

FLAGS = ["--quiet", "--workers", "1", "--no-sensitivity", "--no-dynamics", "--no-report", "--chunk-members", "10"]
TABLES = ("risk.csv", "effects.csv", "objectives.csv", "comparisons.csv", "bands.csv", "members.csv", "parameters.csv")


def fill_disk_at(monkeypatch, fragment: str, after: int = 0):
    """Every write of a file whose path holds ``fragment`` fails with ENOSPC after ``after`` of them."""
    real_open = open
    seen = {"n": 0}

    def full(path, mode="r", *args, **kwargs):
        if ("w" in mode or "a" in mode) and fragment in str(path):
            seen["n"] += 1
            if seen["n"] > after:
                raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return real_open(path, mode, *args, **kwargs)

    monkeypatch.setattr(impact.results, "open", full, raising=False)


@pytest.mark.parametrize("where, after", [(".checkpoints", 2), ("risk.csv", 0)])
def test_a_full_disk_leaves_nothing_half_written_and_resume_completes(tmp_path, capsys, monkeypatch, where, after):
    case = write_case(tmp_path, decline_case(40))
    mine = tmp_path / "notes.txt"
    mine.write_text("the user's own file\n")
    fresh = tmp_path / "fresh"
    assert main(["assess", str(case), "--out", str(fresh), *FLAGS]) == 0
    out = tmp_path / "out"
    fill_disk_at(monkeypatch, where, after)
    capsys.readouterr()
    assert main(["assess", str(case), "--out", str(out), *FLAGS]) == 2
    err = capsys.readouterr().err
    folder = tmp_path / ".out.checkpoints" if where == ".checkpoints" else out  # the folder being written
    assert "No space left on device" in err and str(folder) in err and "Traceback" not in err, err
    assert err.count("\n") == 1
    assert not out.exists() and not list(tmp_path.glob(".out.partial-*")) and not (tmp_path / ".out.lock").exists()
    assert mine.read_text() == "the user's own file\n"
    saved = list((tmp_path / ".out.checkpoints").glob("*.npz"))
    assert saved  # the chunks finished before the disk filled are kept (the first write is fingerprint.json)
    monkeypatch.undo()  # space is freed
    assert main(["assess", str(case), "--out", str(out), *FLAGS, "--resume"]) == 0
    for name in TABLES:
        assert (out / name).read_bytes() == (fresh / name).read_bytes(), name
    assert not (tmp_path / ".out.checkpoints").exists()
