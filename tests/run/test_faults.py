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

import impact.store.results  # noqa: E402
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

    monkeypatch.setattr(impact.store.results, "open", full, raising=False)


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


def test_a_worker_killed_mid_run_loses_nothing(tmp_path, capsys):
    """On a Dask LocalCluster of two worker processes, one worker is killed (SIGKILL) once chunks are
    saved: the run either completes with the tables of a one-worker run (the scheduler re-runs the
    lost chunks) or exits 1 with its finished chunks kept, and --resume then gives those tables."""
    import os
    import signal
    import threading
    import time

    distributed = pytest.importorskip("distributed")
    case = write_case(tmp_path, decline_case(600))
    flags = ["--quiet", "--no-sensitivity", "--no-dynamics", "--no-report", "--chunk-members", "20"]
    fresh = tmp_path / "fresh"
    assert main(["assess", str(case), "--out", str(fresh), "--workers", "1", *flags]) == 0
    out = tmp_path / "out"
    saved = tmp_path / ".out.checkpoints"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None, silence_logs=50) as cluster, \
            distributed.Client(cluster) as client:
        pids = list(client.run(os.getpid).values())
        killed = {}

        def kill_one_mid_run():
            deadline = time.monotonic() + 120
            while time.monotonic() < deadline and not list(saved.glob("runs-*.npz")):
                time.sleep(0.01)
            killed["mid_run"] = not out.exists()  # the results were not complete yet
            os.kill(pids[0], signal.SIGKILL)

        killer = threading.Thread(target=kill_one_mid_run)
        killer.start()
        capsys.readouterr()
        code = main(["assess", str(case), "--out", str(out), "--cluster", cluster.scheduler_address, *flags])
        killer.join()
    assert killed.get("mid_run"), "the run ended before a worker could be killed: make it longer"
    err = capsys.readouterr().err
    assert code in (0, 1), err
    if code == 1:
        assert "--resume" in err and "Traceback" not in err and not out.exists()
        assert main(["assess", str(case), "--out", str(out), "--workers", "1", *flags, "--resume"]) == 0
    for name in TABLES:
        assert (out / name).read_bytes() == (fresh / name).read_bytes(), name
