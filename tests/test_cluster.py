"""The Dask cluster executor against a real ``distributed.LocalCluster``.

Two worker processes on 127.0.0.1 (one thread each). What is checked: the
default run on the cluster equals the local run (statuses, first and held
crossings, fingerprints, final measures); timing replays run on the workers,
record the machine and never overlap on one host; a worker killed while it
runs a pass loses nothing (every task reported exactly once, equal to a local
run); a step that never returns is cancelled and
reported ``timeout``; a data file that differs on a worker stops the run with
one line; ``--resume`` completes a run on the cluster; a bad address is one
line and exit 2 from the CLI; importing the runner does not import dask.
Rules that misbehave come from ``tests/faulty_rules.py`` (on the workers'
PYTHONPATH). No assertion depends on wall-clock speed.
"""

from __future__ import annotations

import os
import platform
import shutil
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

distributed = pytest.importorskip("distributed")  # the `cluster` extra; CI installs it with `test`

from benchsuite.cases import Case  # noqa: E402
from benchsuite.catalogue import load_catalogue  # noqa: E402
from benchsuite.errors import UserError  # noqa: E402
from benchsuite.executors import cluster as cluster_mod  # noqa: E402
from benchsuite.executors.cluster import ClusterExecutor  # noqa: E402
from benchsuite.monitor import PassTask, run_pass  # noqa: E402
from benchsuite.rulespec import parse_rule  # noqa: E402
from benchsuite.runner import RunRequest, execute, plan_cases, run_cases  # noqa: E402

TESTS = Path(__file__).resolve().parent
REPO = TESTS.parent
sys.path.insert(0, str(TESTS))  # faulty_rules importable here (the workers get PYTHONPATH)


@pytest.fixture(scope="module")
def address() -> Iterator[str]:
    old = os.environ.get("PYTHONPATH")
    os.environ["PYTHONPATH"] = os.pathsep.join([str(TESTS), *([old] if old else [])])
    try:
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                      dashboard_address=None) as lc:
            yield lc.scheduler_address
    finally:
        if old is None:
            os.environ.pop("PYTHONPATH", None)
        else:
            os.environ["PYTHONPATH"] = old


def _same(a, b) -> None:
    """Two seed outcomes of the same (case, seed) are the same run."""
    assert (a.status, a.iters, a.held, a.iterations_run) == (b.status, b.iters, b.held, b.iterations_run)
    assert a.checkpoints == b.checkpoints
    # exact equality (NaN equal to NaN): same code, same seed, same BLAS thread count (1) on the same machine
    np.testing.assert_array_equal(np.array(a.fingerprint, dtype=float), np.array(b.fingerprint, dtype=float))
    np.testing.assert_array_equal(np.array([a.final_measure, a.final_dist]), np.array([b.final_measure, b.final_dist]))


def _equal_runs(remote, local) -> None:
    assert [r.case.key() for r in remote] == [r.case.key() for r in local]
    for r, q in zip(remote, local):
        assert r.status == q.status, r.case.key()
        assert r.hyperparams == q.hyperparams
        for a, b in zip(r.outcomes, q.outcomes, strict=True):
            _same(a, b)


@pytest.mark.slow  # two runs of the whole default set (about 200 cases): the acceptance check
def test_the_default_run_on_the_cluster_equals_the_local_run(address: str) -> None:
    cases = plan_cases(RunRequest.make(), out=None).cases  # every default rule on the small tier
    local = run_cases(cases, jobs=2, timing=False, progress=False)
    remote = run_cases(cases, cluster=address, timing=False, progress=False)
    _equal_runs(remote, local)


def test_timing_replays_run_on_the_workers_one_per_machine(address: str) -> None:
    req = RunRequest.make(rules=["gd", "adam"], problems="lsq-kappa1e2-500x50,mgh-beale")
    cases = list(plan_cases(req, out=None).cases)
    # a minibatch case too: its sampler is seeded from the instance and the seed, not the process
    inst = load_catalogue()["lsq-kappa1e2-500x50"]
    cases.append(Case(inst, parse_rule("gd", {"lr": 0.05}), "minibatch", 16, True, (0, 1), budget=300))
    local = run_cases(cases, jobs=1, timing=False, progress=False)
    remote = run_cases(cases, cluster=address, timing=True, repeats=3, progress=False)
    _equal_runs(remote, local)
    timed = [o for r in remote for o in r.outcomes if o.time_per_step is not None]
    assert len(timed) == sum(len(r.outcomes) for r in remote)  # every seed ran steps, so every seed is timed
    assert {o.timed_on for o in timed} == {platform.node()}  # the workers run on this machine
    # both workers are on this host: their replays took turns (intervals from one clock, disjoint)
    with distributed.Client(address, set_as_default=False) as spy:
        spans = sorted((e["start"], e["end"]) for _, e in spy.get_events(cluster_mod.TIMED))
    assert len(spans) >= len(remote)
    assert all(end <= nxt for (_, end), (nxt, _) in zip(spans, spans[1:]))


def _slow_tasks(delay: float, n: int = 4) -> list[PassTask]:
    cat = load_catalogue()
    names = ["lsq-kappa1e2-500x50", "ridge-rho0.7-500x50", "logreg-dense-500x50", "mgh-beale"][:n]
    spec = parse_rule("faulty_rules:SlowGD", {"lr": 0.1, "delay": delay})
    return [PassTask(Case(cat[nm], spec, budget=40), 0, 120.0) for nm in names]


def test_a_worker_killed_mid_pass_loses_nothing(address: str) -> None:
    tasks = _slow_tasks(delay=0.05)  # 40 steps x 50 ms: each pass runs about 2 s
    reports: list[tuple[int, object]] = []
    killed: list[str] = []
    ex = ClusterExecutor(address)
    spy = distributed.Client(address, set_as_default=False)

    def kill_one_busy_worker() -> None:
        for _ in range(400):  # until a worker is running one of our passes (at most 20 s)
            busy = [w for w, keys in spy.processing().items() if any("benchsuite-pass" in str(k) for k in keys)]
            if busy:
                pid = spy.run(os.getpid, workers=[busy[0]])[busy[0]]
                time.sleep(0.5)  # well inside the pass
                os.kill(pid, 9)  # the worker process dies; its nanny starts a new one
                killed.append(busy[0])
                return
            time.sleep(0.05)

    killer = threading.Thread(target=kill_one_busy_worker)
    try:
        killer.start()
        ex.run(tasks, lambda i, rep: reports.append((i, rep)))
        killer.join()
    finally:
        ex.close()
        spy.close()
    assert killed, "no worker was seen running a pass"
    assert sorted(i for i, _ in reports) == list(range(len(tasks)))  # each exactly once
    quick = _slow_tasks(delay=0.0)  # the same steps without the sleep: the same iterates
    for i, rep in reports:
        local = run_pass(quick[i])
        assert rep.outcome.status == local.outcome.status != "error"
        _same(rep.outcome, local.outcome)


def test_a_task_the_scheduler_drops_stops_the_run_with_one_line(address: str) -> None:
    tasks = _slow_tasks(delay=0.05)
    ex = ClusterExecutor(address)
    spy = distributed.Client(address, set_as_default=False)

    def cancel_one() -> None:  # another client cancels one of our tasks by its key
        for _ in range(400):
            keys = [k for keys in spy.processing().values() for k in keys if "benchsuite-pass" in str(k)]
            if keys:
                spy.cancel([distributed.Future(keys[0], client=spy)], force=True)
                return
            time.sleep(0.05)

    canceller = threading.Thread(target=cancel_one)
    try:
        canceller.start()
        with pytest.raises(UserError) as err:
            ex.run(tasks, lambda i, rep: None)
        canceller.join()
    finally:
        ex.close()
        spy.close()
    msg = str(err.value)
    assert "\n" not in msg and "dropped a task" in msg and "--resume" in msg


def test_a_step_that_never_returns_is_cancelled_as_timeout(address: str, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(cluster_mod, "KILL_GRACE", 1.0)
    inst = load_catalogue()["mgh-beale"]
    hang = PassTask(Case(inst, parse_rule("faulty_rules:Hanger", {"lr": 0.001, "at": 3})), 0, 1.0)
    fine = PassTask(Case(inst, parse_rule("gd")), 0, 60.0)
    reports: dict[int, object] = {}
    ex = ClusterExecutor(address)
    try:
        ex.run([hang, fine], lambda i, rep: reports.setdefault(i, rep))
    finally:
        ex.close()
    assert reports[0].outcome.status == "timeout"
    assert "cancelled" in reports[0].outcome.error
    _same(reports[1].outcome, run_pass(fine).outcome)


def test_a_data_file_that_differs_on_a_worker_is_one_line(address: str) -> None:
    cat = load_catalogue()
    task = PassTask(Case(cat["nist-boxbod"], parse_rule("gd")), 0, 60.0)
    path = str(REPO / "benchsuite" / "data" / "strd" / "BoxBOD.dat")
    ex = ClusterExecutor(address)
    try:
        # as if the client's copy of this file had other bytes than the workers'
        ex._files[repr(task.case.instance)] = ((path, "0" * 64),)
        with pytest.raises(UserError) as err:
            ex.run([task], lambda i, rep: None)
    finally:
        ex.close()
    msg = str(err.value)
    assert "\n" not in msg and path in msg and "nist-boxbod" in msg and "differ" in msg


def test_a_data_file_missing_on_the_workers_is_one_line(address: str, tmp_path: Path,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    from benchsuite.catalogue import Instance

    shutil.copy(REPO / "benchsuite" / "data" / "strd" / "BoxBOD.dat", tmp_path / "my-boxbod.dat")
    monkeypatch.chdir(tmp_path)  # the relative path resolves here, not in the workers' folder
    inst = Instance(name="my-boxbod", family="nist_strd", params=(("file", "my-boxbod.dat"), ("start", 1)),
                    tier="small", targets=(1e-2,), budget=50)
    ex = ClusterExecutor(address)
    try:
        with pytest.raises(UserError) as err:
            ex.run([PassTask(Case(inst, parse_rule("gd")), 0, 60.0)], lambda i, rep: None)
    finally:
        ex.close()
    msg = str(err.value)
    assert "\n" not in msg and "my-boxbod.dat" in msg and "not readable" in msg and "same path" in msg


def test_check_files_names_a_missing_path(tmp_path: Path) -> None:
    missing = str(tmp_path / "gone.dat")
    with pytest.raises(cluster_mod.DataFileError, match="gone.dat.*same path"):
        cluster_mod._check_files([(missing, "0" * 64)], "my-instance")


def test_resume_completes_a_run_on_the_cluster(address: str, tmp_path: Path) -> None:
    req = RunRequest.make(rules=["gd", "adam"], problems="lsq-kappa1e2-500x50,mgh-beale")
    first = execute(req, jobs=1, timing=False, out=tmp_path)
    cases = sorted((Path(first.path) / "cases").glob("*.json"))
    assert len(cases) == 4
    cases[0].unlink()  # as if the run had stopped before this case
    cases[2].unlink()
    again = execute(None, resume=first.run_id, timing=False, out=tmp_path, cluster=address)
    assert again.status == "complete" and len(list((Path(first.path) / "cases").glob("*.json"))) == 4
    for r, q in zip(again.results, first.results, strict=True):
        for a, b in zip(r.outcomes, q.outcomes, strict=True):
            _same(a, b)


def test_bad_address_is_one_line_and_exit_2(tmp_path: Path) -> None:
    env = {**os.environ, "BENCHSUITE_CLUSTER_TIMEOUT": "2"}  # a refused connection is retried until then
    bad = "tcp://127.0.0.1:1"
    proc = subprocess.run(
        [sys.executable, "-m", "benchsuite", "run", "--rule", "gd", "--problems", "mgh-beale",
         "--out", str(tmp_path / "res"), "--cluster", bad],
        capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and bad in lines[0], proc.stderr
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "res" / "runs").exists() or not any((tmp_path / "res" / "runs").iterdir())


def test_the_runner_does_not_import_dask() -> None:
    code = ("import sys, benchsuite.runner, benchsuite.executors.cluster, benchsuite.cli; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_tasks_start_instance_by_instance_largest_budget_first() -> None:
    cat = load_catalogue()
    a, b = cat["mgh-beale"], cat["lsq-kappa1e2-500x50"]
    gd, adam = parse_rule("gd"), parse_rule("adam")
    tasks = [PassTask(Case(a, gd, budget=10), 0), PassTask(Case(b, gd, budget=50), 0),
             PassTask(Case(a, adam, budget=100), 0), PassTask(Case(b, adam, budget=20), 0),
             PassTask(Case(a, gd, budget=10, dtype="float32"), 0)]
    order = cluster_mod._order(tasks)
    assert sorted(order) == list(range(len(tasks)))
    # beale (largest budget 100) first, its tasks together, largest first; then lsq; float32 beale is its own group
    assert order == [2, 0, 1, 3, 4]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.integers(1, 500), st.booleans()), min_size=1, max_size=25))
def test_task_order_is_a_permutation_with_each_instance_in_one_stretch(spec: list[tuple[int, int, bool]]) -> None:
    cat = load_catalogue()
    insts = [cat[n] for n in ("mgh-beale", "lsq-kappa1e2-500x50", "rosenbrock-2d", "ridge-rho0.7-500x50")]
    tasks = [PassTask(Case(insts[i], parse_rule("gd"), budget=b, dtype="float32" if f32 else None), 0)
             for i, b, f32 in spec]
    order = cluster_mod._order(tasks)
    assert sorted(order) == list(range(len(tasks)))
    groups = [(tasks[t].case.instance.name, tasks[t].case.dtype) for t in order]
    stretches = [g for k, g in enumerate(groups) if k == 0 or g != groups[k - 1]]
    assert len(stretches) == len(set(groups))  # no group comes back after another started
    budgets = [tasks[t].case.run_budget for t in order]
    firsts = [budgets[k] for k in range(len(order)) if k == 0 or groups[k] != groups[k - 1]]
    assert firsts == sorted(firsts, reverse=True)  # each stretch opens with its largest budget, largest first
