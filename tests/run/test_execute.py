"""Executors, chunking, checkpoints and resume: the same numbers wherever they are computed."""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from casefiles import web_case, write_case
from impact.risk.runs import PER_MEMBER, assess_members, run_options, summarise
from impact.ensemble.draws import draw_ensemble
from impact.case import load_case
from impact.cli import _Progress, main
from impact.run.execute import DaskCluster, InProcess, LocalPool, LocalThreads, make_executor

CORE = ["--quiet", "--no-dynamics", "--no-report"]


def _tables(out: Path) -> dict[str, bytes]:
    """Every CSV of a results directory, by relative path."""
    return {str(p.relative_to(out)): p.read_bytes() for p in sorted(out.rglob("*.csv"))}


def _assert_same_tables(a: Path, b: Path):
    ta, tb = _tables(a), _tables(b)
    assert sorted(ta) == sorted(tb)
    differing = [k for k in ta if ta[k] != tb[k]]
    assert not differing, f"tables differ: {differing}"


def short_web(members: int) -> dict:
    """The four-species test web over a 10-year horizon (every interaction, noise, events)."""
    data = web_case(members=members)
    data["case"]["horizon"] = 10.0
    data["risk"]["horizons"] = [5.0, 10.0]
    data["interventions"][2]["end"] = 10.0
    return data


@pytest.fixture(scope="module")
def web(tmp_path_factory):
    d = tmp_path_factory.mktemp("web")
    case = load_case(write_case(d, short_web(120)))
    return case, draw_ensemble(case, 120, case.seed)


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None, silence_logs=40) as c:
        yield c


@pytest.fixture(scope="module")
def reference(web, tmp_path_factory):
    """The in-process assessment of the web case (core tables and sensitivity), as a results directory."""
    case, _ = web
    out = tmp_path_factory.mktemp("ref") / "out"
    assert main(["assess", case.path, "--out", str(out), "--workers", "1", "--base-samples", "16", *CORE]) == 0
    return out


def test_chunking_does_not_change_any_member(web):
    # each member is stepped on its own, so cutting the ensemble into chunks of 47 (the last one
    # short) must give the per-member summaries of one whole-ensemble run, bit for bit
    case, ens = web
    whole = summarise(case, run_options(case, ens, case.seed))
    chunked = assess_members(case, ens, case.seed, chunk=47)
    for name, s in whole.items():
        for f in PER_MEMBER:
            np.testing.assert_array_equal(getattr(chunked[name], f), getattr(s, f), err_msg=f"{name}.{f}")


def test_pool_draws_the_same_ensemble(web):
    case, ens = web
    pool = LocalPool(2)
    try:
        other = draw_ensemble(case, 120, case.seed, executor=pool)
    finally:
        pool.close()
    np.testing.assert_array_equal(other.draws, ens.draws)
    np.testing.assert_array_equal(other.today, ens.today)
    assert other.counts == ens.counts


@pytest.mark.parametrize("flags", [["--workers", "2", "--chunk-members", "50"],
                                   ["--workers", "2", "--processes", "--chunk-members", "50"],
                                   ["--workers", "1", "--chunk-members", "33"]],
                         ids=["threads-2-workers", "pool-2-workers", "in-process-other-chunks"])
def test_pool_reproduces_in_process_tables(web, reference, tmp_path, flags):
    case, _ = web
    out = tmp_path / "out"
    assert main(["assess", case.path, "--out", str(out), "--base-samples", "16", *flags, *CORE]) == 0
    _assert_same_tables(reference, out)


@pytest.mark.slow
def test_dask_cluster_reproduces_in_process_tables(web, reference, tmp_path, cluster):
    case, _ = web
    out = tmp_path / "out"
    assert main(["assess", case.path, "--out", str(out), "--cluster", cluster.scheduler_address,
                 "--chunk-members", "40", "--base-samples", "16", *CORE]) == 0
    _assert_same_tables(reference, out)
    import json

    assert json.loads((out / "manifest.json").read_text())["execution"]["executor"] == "dask cluster"


@pytest.mark.parametrize("kind", [LocalPool, LocalThreads], ids=["processes", "threads"])
def test_pool_reproduces_the_in_process_dynamics_tables(web, kind):
    import pandas as pd

    from impact.dynamics.lyapunov import DynamicsSettings
    from impact.dynamics.regime_screen import assess_stage

    case, ens = web
    runs = assess_members(case, ens, case.seed)
    s = DynamicsSettings(transient=10.0, window=20.0, sample_dt=0.5, screen_members=4)
    here, _ = assess_stage(case, ens.params, ens.values, runs, settings=s)
    pool = kind(2)
    try:
        there, _ = assess_stage(case, ens.params, ens.values, runs, settings=s, executor=pool)
    finally:
        pool.close()
    for key, frame in here.items():
        pd.testing.assert_frame_equal(there[key], frame, check_exact=True)


def test_pool_reproduces_an_in_process_parallel_scan(tmp_path):
    from test_dynamics import rm_case

    f = rm_case(tmp_path, 1.0)
    common = ["scan", str(f), "--parameter", "K", "--from", "150", "--to", "450", "--steps", "7", "--parallel",
              "--transient", "100", "--window", "100", "--quiet"]
    assert main(common + ["--out", str(tmp_path / "one"), "--workers", "1"]) == 0
    assert main(common + ["--out", str(tmp_path / "two"), "--workers", "2"]) == 0
    _assert_same_tables(tmp_path / "one", tmp_path / "two")


def _square_or_die(task):
    """Square a number; the first call with a marker path kills its own worker process."""
    value, marker = task
    if marker is not None and not os.path.exists(marker):
        Path(marker).write_text("died once")
        os._exit(13)
    return value * value


def test_the_default_local_executor_is_threads_and_processes_on_request():
    assert isinstance(make_executor(2), LocalThreads)
    assert isinstance(make_executor(2, processes=True), LocalPool)
    assert isinstance(make_executor(1), InProcess)


def test_threads_run_tasks_side_by_side_and_return_every_result():
    import threading

    barrier = threading.Barrier(2, timeout=10)

    def meet(k):
        # both workers must be inside a task at once for the barrier to open
        if k < 2:
            barrier.wait()
        return k * k

    ex = LocalThreads(2)
    try:
        got = dict(ex.map(meet, list(range(6))))
    finally:
        ex.close()
    assert got == {k: k * k for k in range(6)}


def test_threads_pass_a_task_error_on(tmp_path):
    def fail(k):
        if k == 3:
            raise ValueError("chunk 3 failed")
        return k

    ex = LocalThreads(2)
    try:
        with pytest.raises(ValueError, match="chunk 3"):
            dict(ex.map(fail, list(range(6))))
    finally:
        ex.abort()


def test_pool_retries_the_chunks_of_a_worker_that_died(tmp_path):
    pool = LocalPool(2)
    try:
        tasks = [(k, str(tmp_path / "marker") if k == 3 else None) for k in range(8)]
        got = dict(pool.map(_square_or_die, tasks))
    finally:
        pool.close()
    assert got == {k: k * k for k in range(8)}
    assert (tmp_path / "marker").exists()  # the worker really died once


@pytest.mark.slow
def test_dask_retries_the_chunks_of_a_worker_that_died(tmp_path, cluster):
    ex = DaskCluster(cluster.scheduler_address)
    try:
        tasks = [(k, str(tmp_path / "marker") if k == 2 else None) for k in range(6)]
        got = dict(ex.map(_square_or_die, tasks))
    finally:
        ex.close()
    assert got == {k: k * k for k in range(6)}
    assert (tmp_path / "marker").exists()


def test_cluster_that_does_not_answer_is_a_clear_error_in_bounded_time(web, tmp_path, capsys):
    pytest.importorskip("distributed")
    case, _ = web
    t0 = time.monotonic()
    rc = main(["assess", case.path, "--out", str(tmp_path / "out"), "--cluster", "tcp://127.0.0.1:9", *CORE])
    err = capsys.readouterr().err
    assert rc == 2
    assert "--cluster" in err and "tcp://127.0.0.1:9" in err and "Traceback" not in err
    assert time.monotonic() - t0 < 60
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
def test_scheduler_without_workers_is_a_clear_error(web, tmp_path, capsys):
    distributed = pytest.importorskip("distributed")
    case, _ = web
    with distributed.LocalCluster(n_workers=0, host="127.0.0.1", dashboard_address=None, silence_logs=40) as empty:
        rc = main(["assess", case.path, "--out", str(tmp_path / "out"), "--cluster", empty.scheduler_address, *CORE])
    err = capsys.readouterr().err
    assert rc == 2 and "no workers" in err and "dask worker" in err
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("flag,value", [("--workers", "0"), ("--chunk-members", "0")])
def test_bad_executor_flags_exit_2(web, tmp_path, capsys, flag, value):
    case, _ = web
    assert main(["assess", case.path, "--out", str(tmp_path / "out"), flag, value, *CORE]) == 2
    assert flag in capsys.readouterr().err


def test_processes_with_a_cluster_is_refused_naming_the_flag(web, tmp_path, capsys):
    case, _ = web
    rc = main(["assess", case.path, "--out", str(tmp_path / "out"), "--processes", "--cluster", "tcp://127.0.0.1:9", *CORE])
    err = capsys.readouterr().err
    assert rc == 2 and "--processes" in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


def test_unwritable_output_folder_is_a_clear_error(web, tmp_path, capsys):
    case, _ = web
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    assert main(["assess", case.path, "--out", str(blocker / "out"), "--workers", "1", *CORE]) == 2
    err = capsys.readouterr().err
    assert "cannot write" in err and "Traceback" not in err


def _disk_full_at(monkeypatch, n: int):
    """Make the n-th atomic write from now on fail as on a full disk; return the undo."""
    import errno

    import impact.store.results as results

    real = results._atomic_write
    calls = {"n": 0}

    def writer(path, data):
        calls["n"] += 1
        if calls["n"] == n:
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        real(path, data)

    monkeypatch.setattr(results, "_atomic_write", writer)
    return lambda: monkeypatch.setattr(results, "_atomic_write", real)


def test_full_disk_keeps_checkpoints_valid_and_resume_completes(web, reference, tmp_path, capsys, monkeypatch):
    case, _ = web
    out = tmp_path / "out"
    undo = _disk_full_at(monkeypatch, 4)  # the fourth checkpoint write finds the disk full
    args = ["assess", case.path, "--out", str(out), "--workers", "1", "--chunk-members", "30", "--base-samples", "16", *CORE]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "No space left" in err and "--resume" in err
    assert not out.exists()
    saved = sorted(p.name for p in (tmp_path / ".out.checkpoints").glob("*.npz"))
    assert len(saved) == 2  # after the fingerprint: one draw block and one run chunk, then the failed write
    undo()
    assert main(args + ["--resume"]) == 0
    _assert_same_tables(reference, out)
    assert not (tmp_path / ".out.checkpoints").exists()  # removed once the results are complete


def test_resume_refuses_checkpoints_of_another_run(web, tmp_path, capsys, monkeypatch):
    case, _ = web
    out = tmp_path / "out"
    undo = _disk_full_at(monkeypatch, 3)
    base = ["assess", case.path, "--out", str(out), "--workers", "1", "--chunk-members", "40", *CORE, "--no-sensitivity"]
    assert main(base + ["--seed", "1"]) == 2
    undo()
    capsys.readouterr()
    assert main(base + ["--seed", "2", "--resume"]) == 2
    err = capsys.readouterr().err
    assert "--resume" in err and "seed" in err


def test_killed_run_resumes_to_the_uninterrupted_result(web, reference, tmp_path):
    # a real kill (SIGKILL) part-way through the option runs, then --resume
    case, _ = web
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    out = tmp_path / "out"
    ckpt = tmp_path / ".out.checkpoints"
    cmd = [sys.executable, "-m", "impact.cli", "assess", case.path, "--out", str(out), "--workers", "1",
           "--chunk-members", "20", "--no-sensitivity", "--no-dynamics", "--no-report", "--quiet"]
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 120
        while len(list(ckpt.glob("runs-*.npz"))) < 2 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert proc.poll() is None, "the run finished before it could be interrupted"
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    finally:
        if proc.poll() is None:
            proc.kill()
    assert not out.exists()
    done_before = len(list(ckpt.glob("runs-*.npz")))
    assert 2 <= done_before < 6
    r = subprocess.run(cmd + ["--resume"], env=env, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    # the core tables (press_signs.csv belongs to the decision stage, off here)
    core = [k for k in _tables(reference) if "/" not in k and k != "press_signs.csv"]
    assert core and all(_tables(out)[k] == _tables(reference)[k] for k in core)
    import json

    assert json.loads((out / "manifest.json").read_text())["execution"]["chunks_reused"] >= done_before


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_progress_shows_rate_and_time_left_on_a_terminal():
    # the meter's own clock: patching time.monotonic would also stop every other thread's clock
    clock = iter([0.0, 0.0, 1.0, 2.0, 3.0])
    tty = _Terminal()
    p = _Progress(quiet=False, stream=tty, clock=lambda: next(clock))
    p.count("simulating", 0, 100, "members")
    p.count("simulating", 25, 100, "members")  # 25 members in 1 s → 25/s, 3 s left
    assert "25/100 members, 25/s, about 3 s left" in tty.getvalue()


@pytest.mark.parametrize("quiet,stream", [(True, _Terminal()), (False, io.StringIO())], ids=["--quiet", "not-a-terminal"])
def test_progress_is_silent_when_asked_or_not_a_terminal(quiet, stream):
    p = _Progress(quiet=quiet, stream=stream)
    p.count("simulating", 100, 100, "members")
    p("a stage", force=True)
    assert stream.getvalue() == ""


def test_in_process_executor_yields_in_task_order():
    assert list(InProcess().map(lambda x: x + 1, [1, 2, 3])) == [(0, 2), (1, 3), (2, 4)]


def test_an_executor_block_closes_on_success_and_aborts_on_error():
    from impact.run.execute import LocalThreads

    calls = []

    class Recorded(LocalThreads):
        def close(self):
            calls.append("close")
            super().close()

        def abort(self):
            calls.append("abort")
            super().abort()

    with Recorded(2) as ex:
        assert [r for _, r in ex.map(abs, [-1, -2])] == [1, 2]
    assert calls == ["close"]
    with pytest.raises(ZeroDivisionError):
        with Recorded(2) as ex:
            list(ex.map(lambda x: 1 / x, [1, 0]))
    assert calls == ["close", "abort"]
    assert ex._pool is None  # the workers ended with the block


@pytest.fixture(scope="module")
def counted_web(tmp_path_factory):
    """The short web with its foxes counted in individuals below 30 on an area of 20 (40 foxes today):
    the culls and the failed removals leave a few foxes whose births and deaths are random events."""
    data = short_web(60)
    data["individuals"] = {"fox": {"area": 20.0, "switch_below": 30.0}}
    d = tmp_path_factory.mktemp("counted")
    case = load_case(write_case(d, data))
    return case, draw_ensemble(case, 60, case.seed)


def test_counted_members_do_not_depend_on_chunk_or_executor(counted_web):
    # each member's births and deaths at low numbers come from its own stream: any chunking and
    # any executor give its summaries bit for bit
    from dataclasses import replace

    case, ens = counted_web
    whole = summarise(case, run_options(case, ens, case.seed))
    continuous = summarise(case, run_options(replace(case, individuals=()), ens, case.seed))
    assert any(not np.array_equal(whole[k].minimum, continuous[k].minimum) for k in whole), "nothing was counted"
    for kind in (None, LocalThreads, LocalPool):
        pool = kind(2) if kind else None
        try:
            got = assess_members(case, ens, case.seed, chunk=17, executor=pool)
        finally:
            if pool:
                pool.close()
        for name, s in whole.items():
            for f in PER_MEMBER:
                np.testing.assert_array_equal(getattr(got[name], f), getattr(s, f), err_msg=f"{kind} {name}.{f}")
