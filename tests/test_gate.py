"""The gate's verdict rules on hand-made records (pure; no runs)."""

from __future__ import annotations

import json
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.baseline import CaseRecord, SeedRecord
from benchsuite.errors import UserError
from benchsuite.gate import GateConfig, check_definitions, judge, judge_case
from test_baseline import baseline, case_record


def with_outcomes(c: CaseRecord, **changes) -> CaseRecord:
    """Same case, every seed's record changed as given."""
    outs = tuple(SeedRecord(**{**o.__dict__, **changes}) for o in c.outcomes)
    return CaseRecord(**{**c.__dict__, "outcomes": outs})


def with_iters(c: CaseRecord, per_seed) -> CaseRecord:
    outs = tuple(SeedRecord(**{**o.__dict__, "iters": tuple(it)}) for o, it in zip(c.outcomes, per_seed))
    return CaseRecord(**{**c.__dict__, "outcomes": outs})


def test_identical_rerun_passes() -> None:
    base = case_record()
    v = judge_case(base, base)
    assert v.verdict == "pass" and not v.reasons and not v.notes


def test_default_slack_is_max_one_iteration_one_percent() -> None:
    cfg = GateConfig()
    assert cfg.deterministic_allowance(40) == 1  # 1 % of 40 is 0.4 -> 1 iteration
    assert cfg.deterministic_allowance(1000) == 10
    assert cfg.deterministic_allowance(1001) == 11  # ceil
    base = case_record(iters_per_seed=[(10, 1000)])
    assert judge_case(base, with_iters(base, [(11, 1010)])).verdict == "pass"
    v = judge_case(base, with_iters(base, [(11, 1011)]))
    assert v.verdict == "fail"
    assert v.reasons == ("target 1e-06: 1011 iterations vs baseline 1000 (+1.1 %, allowed +10)",)
    assert judge_case(base, with_iters(base, [(12, 1000)])).verdict == "fail"  # 2 > 1 iteration


def test_slack_is_configurable() -> None:
    base = case_record(iters_per_seed=[(10, 1000)])
    cand = with_iters(base, [(10, 1100)])
    assert judge_case(base, cand).verdict == "fail"
    assert judge_case(base, cand, GateConfig(slack_rel=0.1)).verdict == "pass"
    assert judge_case(base, with_iters(base, [(15, 1000)]), GateConfig(slack_iters=5)).verdict == "pass"
    with pytest.raises(UserError, match="--slack-rel"):
        GateConfig(slack_rel=-0.1)


def test_lost_target_fails_and_gained_target_improves() -> None:
    base = case_record(iters_per_seed=[(10, None)])
    lost = judge_case(base, with_iters(base, [(None, None)]))
    assert lost.verdict == "fail" and "target 1e-02 no longer reached within budget 1000" in lost.reasons[0]
    gained = judge_case(base, with_iters(base, [(10, 900)]))
    assert gained.verdict == "improved" and "now reached" in gained.notes[0]


def test_faster_is_an_improvement_not_a_failure() -> None:
    base = case_record(iters_per_seed=[(10, 400)])
    v = judge_case(base, with_iters(base, [(10, 300)]))
    assert v.verdict == "improved"
    rep = judge(baseline(base), [with_iters(base, [(10, 300)])])
    assert rep.passed and "re-recording" in rep.summary()


@pytest.mark.parametrize("status", ["diverged", "error", "timeout"])
def test_bad_status_fails(status: str) -> None:
    base = case_record()
    v = judge_case(base, with_outcomes(base, status=status, error="ZeroDivisionError: boom"))
    assert v.verdict == "fail" and v.reasons[0].startswith(f"seed 0: {status} after")
    assert "boom" in v.reasons[0]


def test_final_point_off_the_optimum_fails() -> None:
    base = case_record()  # final_dist 1e-5 <= x_tol 1e-3
    v = judge_case(base, with_outcomes(base, final_dist=2e-2))
    assert v.verdict == "fail" and "x_tol" in v.reasons[0]
    # not checked when the baseline itself was not within x_tol
    loose = with_outcomes(base, final_dist=5e-2)
    assert judge_case(loose, with_outcomes(base, final_dist=2e-2)).verdict == "pass"


def test_stochastic_allowance_uses_the_baseline_seed_spread() -> None:
    base = case_record(seeds=(0, 1, 2, 3, 4), iters_per_seed=[(10, v) for v in (100, 104, 110, 118, 120)], oracle="minibatch")
    # median 110, range 20 -> allowance 20
    ok = with_iters(base, [(10, v) for v in (110, 120, 130, 125, 129)])  # median 125: +15
    assert judge_case(base, ok).verdict == "pass"
    bad = with_iters(base, [(10, v) for v in (120, 126, 131, 140, 150)])  # median 131: +21
    v = judge_case(base, bad)
    assert v.verdict == "fail" and "allowed +20" in v.reasons[0]
    # a target reached by fewer than half the seeds counts as not reached (median +inf)
    lost = with_iters(base, [(10, v) for v in (100, 104, None, None, None)])
    assert judge_case(base, lost).targets[1].outcome == "lost"


def test_exact_mode_checks_the_fingerprint() -> None:
    base = case_record()
    fp = base.outcomes[0].fingerprint
    tiny = with_outcomes(base, fingerprint=tuple(v * (1 + 1e-12) for v in fp))  # round-off level
    small = with_outcomes(base, fingerprint=fp[:2] + (fp[2] * (1 + 1e-6),) + fp[3:])
    cfg = GateConfig(exact=True)
    assert judge_case(base, tiny, cfg).verdict == "pass"
    v = judge_case(base, small, cfg)
    assert v.verdict == "fail" and "fingerprint changed at iteration 4" in v.reasons[0]
    assert judge_case(base, small).verdict == "pass"  # not checked by default


def test_check_definitions_lists_changed_and_missing() -> None:
    class Inst:
        def __init__(self, h: str) -> None:
            self.h = h

        def definition_hash(self) -> str:
            return self.h

    b = baseline(case_record("a/full"), case_record("b/full"), case_record("c/full"))
    check_definitions(b, {"a": Inst("ab" * 32), "b": Inst("ab" * 32), "c": Inst("ab" * 32)})
    with pytest.raises(UserError, match="changed since the baseline was recorded: b; instances not in the catalogue: c"):
        check_definitions(b, {"a": Inst("ab" * 32), "b": Inst("cd" * 32)})


@settings(max_examples=200, deadline=None)
@given(
    seeds=st.lists(st.one_of(st.none(), st.integers(1, 10_000)), min_size=1, max_size=7),
    slack=st.integers(0, 5),
    rel=st.floats(0, 0.5),
)
def test_a_rerun_with_identical_counts_never_fails(seeds, slack, rel) -> None:
    """Law: the same counts per seed pass whatever the configuration."""
    n = len(seeds)
    base = case_record(seeds=tuple(range(n)), iters_per_seed=[(v, v) for v in seeds], oracle="minibatch" if n > 1 else "full")
    assert judge_case(base, base, GateConfig(slack_iters=slack, slack_rel=rel)).verdict == "pass"


@settings(max_examples=200, deadline=None)
@given(b=st.integers(1, 100_000), extra=st.integers(0, 100_000))
def test_deterministic_rule_law(b: int, extra: int) -> None:
    """Law: a deterministic case fails exactly when c - b > max(1, ceil(0.01 b))."""
    base = case_record(iters_per_seed=[(b, b)])
    v = judge_case(base, with_iters(base, [(b + extra, b + extra)]))
    assert (v.verdict == "fail") == (extra > max(1, math.ceil(0.01 * b)))


# ------------------------------------------------------------------------------
# Self-validation on real runs: the gate fails deliberately broken rules
# (tests/broken_rules.py) against the correct rule's baseline, and passes clean
# reruns, correct re-implementations and reruns with another --jobs.
import shutil
from pathlib import Path

from benchsuite.baseline import load_baseline, make_baseline, write_baseline
from benchsuite.gate import run_gate

REPO = Path(__file__).resolve().parents[1]


def warm_reference(dest: Path) -> None:
    """Copy the committed reference cache (certified optima) into a scratch project, if there is one."""
    if (REPO / "results" / "reference").is_dir():
        shutil.copytree(REPO / "results" / "reference", dest)
EXTRA = REPO / "examples" / "quorvane" / "problems.toml"  # quad-small-gradients-kappa10-d10

#: base rule -> (hyperparameters, problems). Chosen so that each breakage shows:
#: Adam at lr = 0.1 converges in 30-170 steps, so the early-step errors (bias
#: correction, step counter) move the crossings by several iterations; the
#: small-gradient quadratic exposes eps; heavy ball with its textbook
#: parameters is at the edge of stability, where a wrong sign or a stale buffer
#: diverges.
BASELINES = {
    "adam": ({"lr": 0.1}, "quad-diag-kappa10-d10,logreg-dense-500x50,quad-small-gradients-kappa10-d10"),
    "heavy_ball": ({}, "quad-diag-kappa100-d50,quad-small-gradients-kappa10-d10"),
    "rmsprop": ({"lr": 0.01}, "quad-diag-kappa10-d10,quad-small-gradients-kappa10-d10"),
    "gd": ({}, "quad-diag-kappa10-d10"),
}

#: broken variant -> the rule whose baseline it must fail
BROKEN = {
    "AdamNoBiasCorrection": "adam",  # missing bias correction
    "AdamEpsInsideSqrt": "adam",  # eps inside the square root
    "AdamBeta2AsBeta1": "adam",  # wrong decay constant
    "AdamStepOffByOne": "adam",  # step counter off by one
    "AdamLrSquared": "adam",  # learning rate applied twice
    "HeavyBallSignError": "heavy_ball",  # sign error in the momentum term
    "HeavyBallStaleBuffer": "heavy_ball",  # momentum buffer never updated
    "RMSPropEpsInsideSqrt": "rmsprop",  # eps inside the square root
    "RMSPropWrongDecay": "rmsprop",  # wrong decay constant (0.95 for 0.9)
    "GDStepTwice": "gd",  # learning rate applied twice
}
CORRECT = {"TextbookAdam": "adam", "TextbookHeavyBall": "heavy_ball", "TextbookRMSProp": "rmsprop"}


@pytest.fixture(scope="module")
def recorded(tmp_path_factory) -> dict[str, Path]:
    """Baselines of the built-in rules, written to files and read back by the gate.

    Runs in a scratch folder holding a copy of the committed reference cache,
    so the example instance's optimum is not written into the repository.
    """
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, run_cases

    work = tmp_path_factory.mktemp("gate")
    warm_reference(work / "results" / "reference")
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(work)
        cat = load_catalogue([EXTRA])
        out = {}
        for rule, (params, problems) in BASELINES.items():
            spec = parse_rule(rule, params)
            cases = [Case(instance=i, rule=spec) for i in select(cat, problems, None)]
            results = run_cases(cases, jobs=2, timing=False, progress=False)
            assert all(r.status == "reached" for r in results), [(r.case.key(), r.status) for r in results]
            out[rule] = write_baseline(make_baseline(results, rule_label=spec.label), work / f"{rule}.json")
        yield out


def gate(recorded: dict[str, Path], base: str, rule: str, jobs: int = 1, **cfg):
    return run_gate(load_baseline(recorded[base]), rule, config=GateConfig(**cfg), jobs=jobs, catalogue_paths=[EXTRA])


@pytest.mark.parametrize("variant", sorted(BROKEN))
def test_gate_fails_every_broken_variant(recorded, variant: str) -> None:
    report = gate(recorded, BROKEN[variant], f"broken_rules:{variant}")
    assert not report.passed, f"{variant} passed the gate:\n" + "\n".join(
        f"{v.key}: {v.verdict} {v.notes}" for v in report.verdicts
    )
    assert all(v.reasons for v in report.failures)


@pytest.mark.parametrize("rule", sorted(BASELINES))
def test_clean_rerun_passes_with_any_jobs(recorded, rule: str) -> None:
    for jobs in (1, 2):
        report = gate(recorded, rule, rule, jobs=jobs, exact=True)
        assert report.passed and not report.improvements, report.summary()
        # identical iteration counts, not merely within the slack
        assert all(t.outcome == "same" and t.baseline == t.candidate for v in report.verdicts for t in v.targets)


@pytest.mark.parametrize("variant", sorted(CORRECT))
def test_correct_reimplementation_passes_even_exact(recorded, variant: str) -> None:
    """An independent plain-numpy rule differs from the built-in only by round-off."""
    report = gate(recorded, CORRECT[variant], f"broken_rules:{variant}", exact=True)
    assert report.passed, [v.reasons for v in report.failures]


def test_param_override_is_used(recorded) -> None:
    """--param replaces a recorded hyperparameter: adam at lr 0.01 is far slower than at 0.1."""
    report = run_gate(load_baseline(recorded["adam"]), "adam", ["lr=0.01"], catalogue_paths=[EXTRA], jobs=1)
    assert not report.passed and "lr=0.01" in report.candidate_rule


def test_changed_definition_is_a_configuration_error(recorded, tmp_path: Path) -> None:
    changed = tmp_path / "problems.toml"
    changed.write_text(EXTRA.read_text().replace("seed = 1", "seed = 2"))
    with pytest.raises(UserError, match="changed since the baseline was recorded: quad-small-gradients-kappa10-d10"):
        run_gate(load_baseline(recorded["adam"]), "adam", catalogue_paths=[changed])


def test_stochastic_case_clean_rerun_passes_and_regression_fails(tmp_path: Path) -> None:
    """Minibatch Adam over 5 seeds: the same seeds reproduce every count (any --jobs);
    halving the step is a real regression beyond the seed-to-seed spread."""
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, run_cases

    spec = parse_rule("adam", {"lr": 0.01})
    (inst,) = select(load_catalogue(), "lsq-kappa1e2-500x50")
    case = Case(instance=inst, rule=spec, oracle="minibatch", batch=50, seeds=(0, 1, 2, 3, 4))
    results = run_cases([case], jobs=2, timing=False, progress=False)
    path = write_baseline(make_baseline(results, rule_label=spec.label), tmp_path / "sgd.json")
    base = load_baseline(path)
    assert base.cases[0].stochastic and base.cases[0].targets[0] == 1e-2
    assert base.cases[0].outcomes[0].iters[0] is not None  # the loose target is reached, so there is something to lose
    for jobs in (1, 2):
        clean = run_gate(base, "adam", jobs=jobs)
        assert clean.passed and all(t.baseline == t.candidate for t in clean.verdicts[0].targets), clean.summary()
    slow = run_gate(base, "adam", ["lr=0.005"], jobs=2)
    assert not slow.passed, gate_table_text(slow)


def gate_table_text(report) -> str:
    from benchsuite.report import gate_table

    return gate_table(report)


def _cli(cwd: Path, *args: str):
    import os
    import subprocess
    import sys

    env = {**os.environ, "PYTHONPATH": str(REPO / "tests")}  # broken_rules importable
    return subprocess.run([sys.executable, "-m", "benchsuite", *args], cwd=cwd, capture_output=True, text=True,
                          env=env, check=False)


def test_cli_baseline_and_gate_exit_codes(tmp_path: Path) -> None:
    import xml.etree.ElementTree as ET

    warm_reference(tmp_path / "results" / "reference")
    rec = _cli(tmp_path, "baseline", "--rule", "adam", "--param", "lr=0.1", "--problems", "quad-diag-kappa10-d10",
               "--out", "base.json", "--jobs", "1")
    assert rec.returncode == 0, rec.stderr
    again = _cli(tmp_path, "baseline", "--rule", "adam", "--problems", "quad-diag-kappa10-d10", "--out", "base.json")
    assert again.returncode == 2 and again.stderr.strip() == "benchsuite: error: base.json: baseline exists; pass --force to overwrite it"

    div = _cli(tmp_path, "baseline", "--rule", "gd", "--param", "lr=5", "--problems", "quad-diag-kappa10-d10",
               "--out", "div.json", "--jobs", "1")
    assert div.returncode == 2 and "div.json: not written: 1 case(s) failed with gd(lr=5): quad-diag-kappa10-d10 (diverged" in div.stderr
    assert not (tmp_path / "div.json").exists()

    ok = _cli(tmp_path, "gate", "--rule", "adam", "--baseline", "base.json", "--junit", "ok.xml", "--jobs", "1")
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert "PASS: 1 of 1 cases pass" in ok.stdout

    bad = _cli(tmp_path, "gate", "--rule", "broken_rules:AdamLrSquared", "--baseline", "base.json", "--junit", "bad.xml",
               "--markdown", "bad.md", "--jobs", "1")
    assert bad.returncode == 1, bad.stdout + bad.stderr
    root = ET.parse(tmp_path / "bad.xml").getroot()  # well-formed XML
    assert root.get("failures") == "1"
    assert "161 iterations vs baseline 32" in root.find("testcase/failure").get("message")
    assert (tmp_path / "bad.md").read_text().startswith("## ❌ benchsuite gate: FAIL")

    js = _cli(tmp_path, "gate", "--rule", "adam", "--baseline", "base.json", "--json", "--jobs", "1")
    assert js.returncode == 0 and json.loads(js.stdout)["passed"] is True

    wrong = _cli(tmp_path, "gate", "--rule", "gd", "--baseline", "base.json", "--jobs", "1")
    assert wrong.returncode == 2 and "unknown hyperparameter(s) beta1, beta2, eps" in wrong.stderr
    assert "records the hyperparameters of adam(lr=0.1)" in wrong.stderr

    missing = _cli(tmp_path, "gate", "--rule", "adam", "--baseline", "nope.json")
    assert missing.returncode == 2 and missing.stderr.strip() == "benchsuite: error: nope.json: baseline file not found"
    (tmp_path / "broken.json").write_text('{"schema": "benchsuite-baseline/1", "cases": [{}]}')
    malformed = _cli(tmp_path, "gate", "--rule", "adam", "--baseline", "broken.json")
    assert malformed.returncode == 2 and "broken.json: cases[0].targets: missing" in malformed.stderr
    assert "Traceback" not in malformed.stderr


def test_quorvane_example_baseline_passes(monkeypatch: pytest.MonkeyPatch) -> None:
    """The committed example (examples/quorvane) stays valid: its rule passes its own baseline, exactly."""
    quorvane = REPO / "examples" / "quorvane"
    monkeypatch.chdir(quorvane)
    base = load_baseline("baseline.json")
    report = run_gate(base, "quorvane_optim:QuorvaneAdam", config=GateConfig(exact=True), catalogue_paths=["problems.toml"],
                      jobs=1)
    assert report.passed, [v.reasons for v in report.failures]


@pytest.mark.parametrize("path", sorted((REPO / "results" / "baselines").glob("*.json")), ids=lambda p: p.stem)
def test_builtin_rules_meet_their_committed_baselines(path: Path) -> None:
    """results/baselines/<rule>.json guard the built-in rules against regressions."""
    base = load_baseline(path)
    rule = base.cases[0].rule
    assert path.stem == rule
    report = run_gate(base, rule, jobs=1)
    assert report.passed, [(v.key, v.reasons) for v in report.failures]
