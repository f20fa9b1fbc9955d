"""Conformance of a rule to the built-in method it claims to be (benchsuite.conformance, `benchsuite conform`)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from benchsuite.conformance import check_conformance, compare_trajectories, map_hyperparams, parse_params
from benchsuite.errors import UserError
from benchsuite.pytest_plugin import assert_conforms

REPO = Path(__file__).resolve().parents[1]
QUICK = "quad-diag-kappa10-d10,logreg-dense-scaled100-500x50"


def test_compare_trajectories_finds_the_first_departure() -> None:
    x_star = np.zeros(2)
    ref = np.array([[1.0, 1.0], [0.5, 0.5], [0.25, 0.25], [0.125, 0.125]])
    same = ref * (1 + 1e-12)  # within the floor rtol 1e-9
    assert compare_trajectories(ref, [], same, x_star)[0] is None
    off = ref.copy()
    off[2] *= 1.001
    first, diff, allow, rfrom, _ = compare_trajectories(ref, [], off, x_star)
    assert first == 3 and diff == pytest.approx(1e-3) and allow == pytest.approx(1e-9, rel=0.1) and rfrom is None
    # a shadow pass 1e-4 away: K x envelope = 1e-2 relative allows the 1e-3 departure (not dominated: < 1e-3)
    shadow = ref * (1 + 1e-4)
    first, _, _, rfrom, worst = compare_trajectories(ref, [shadow], off, x_star)
    assert first is None and rfrom is None and worst < 1
    # a shadow 1e-2 away: round-off-dominated from step 1
    assert compare_trajectories(ref, [ref * (1 + 1e-2)], off, x_star)[3] == 1


def test_torch_style_names_are_mapped() -> None:
    hp, ignored = map_hyperparams("adam", {"lr": 0.01, "betas": (0.8, 0.99), "eps": 1e-8, "weight_decay": 0,
                                           "amsgrad": False, "foreach": None}, "torch")
    assert hp == {"lr": 0.01, "beta1": 0.8, "beta2": 0.99, "eps": 1e-8}
    assert ignored == ("amsgrad=False", "foreach=None", "weight_decay=0")
    hp, _ = map_hyperparams("rmsprop", {"lr": 0.01, "alpha": 0.95}, "torch")
    assert hp["decay"] == 0.95 and hp["eps_inside_sqrt"] is False
    assert map_hyperparams("rmsprop", {}, "torch")[0]["decay"] == 0.99  # torch's own default (torch_preset)
    assert map_hyperparams("rmsprop", {}, "paper")[0]["decay"] == 0.9
    with pytest.raises(UserError, match="weight_decay=0.1 of the candidate has no counterpart in adam"):
        map_hyperparams("adam", {"weight_decay": 0.1})
    assert parse_params(["betas=(0.9,0.999)", "lr=[1e-2]"]) == {"betas": (0.9, 0.999), "lr": 0.01}


def test_a_correct_reimplementation_conforms() -> None:
    report = check_conformance("broken_rules:TextbookAdam", "adam", {"lr": 0.01}, problems=QUICK, steps=400)
    assert report.conforms, [c.describe() for c in report.cases]
    assert all(c.first_divergence is None and c.steps == 400 for c in report.cases)


def test_a_rewrite_in_another_operation_order_conforms() -> None:
    report = check_conformance("broken_rules:RMSPropReordered", "rmsprop", {"lr": 0.01}, steps=600)
    assert report.conforms, [c.describe() for c in report.cases]


@pytest.mark.parametrize("variant, step", [
    ("AdamNoBiasCorrection", 1),  # issue 8 item 9: faster at lr = 0.01, so the gate called it "improved"
    ("AdamStepOffByOne", 1),
    ("AdamStateReset", 100),  # the state reset at step 100 (AdamStateReset.RESET_EVERY)
])
def test_broken_variants_depart_at_the_step_of_the_bug(variant: str, step: int) -> None:
    report = check_conformance(f"broken_rules:{variant}", "adam", {"lr": 0.01}, problems=QUICK, steps=300)
    assert not report.conforms
    assert [c.first_divergence for c in report.cases] == [step] * 2, [c.describe() for c in report.cases]
    assert "DOES NOT CONFORM" in report.summary()


def test_torch_optimizer_conforms_to_the_builtin() -> None:
    pytest.importorskip("torch")  # optional dependency: the mapping is also tested without it above
    report = check_conformance("torch.optim:Adam", "adam", parse_params(["lr=0.01", "betas=(0.9,0.99)"]),
                               problems="quad-diag-kappa10-d10", steps=200)
    assert report.convention == "torch" and report.conforms, [c.describe() for c in report.cases]
    assert dict(report.hyperparams)["beta2"] == 0.99


def test_assert_conforms_helper() -> None:
    # the stale buffer first matters at step 3 (x_prev is x0 for the first two steps either way)
    report = assert_conforms("broken_rules:TextbookHeavyBall", "heavy_ball", {"lr": 0.01},
                             problems="quad-diag-kappa10-d10", steps=200)
    assert report.conforms
    with pytest.raises(AssertionError, match=r"(?s)departs from the built-in heavy_ball.*departs at step 3"):
        assert_conforms("broken_rules:HeavyBallStaleBuffer", "heavy_ball", {"lr": 0.01},
                        problems="quad-diag-kappa10-d10", steps=200)


def _cli(*args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(REPO / "tests")}
    return subprocess.run([sys.executable, "-m", "benchsuite", "conform", *args], capture_output=True, text=True,
                          env=env, check=False, cwd=REPO)


def test_cli_exit_codes() -> None:
    ok = _cli("--rule", "broken_rules:TextbookAdam", "--as", "adam", "--param", "lr=0.01",
              "--problems", "quad-diag-kappa10-d10", "--steps", "200")
    assert ok.returncode == 0, ok.stderr
    assert "CONFORMS: broken_rules:TextbookAdam(lr=0.01) agrees with the built-in adam on 1 of 1 problems" in ok.stdout
    bad = _cli("--rule", "broken_rules:AdamNoBiasCorrection", "--as", "adam", "--problems", "quad-diag-kappa10-d10",
               "--steps", "50", "--json")
    assert bad.returncode == 1, bad.stderr
    doc = json.loads(bad.stdout)
    assert doc["conforms"] is False and doc["cases"][0]["first_divergence"] == 1
    for args, msg in (
        (("--as", "adamx"), "--as 'adamx': not a built-in rule"),
        (("--as", "adam", "--param", "lr=fast"), "lr"),
        (("--as", "adam", "--steps", "0"), "--steps: must be >= 1"),
        (("--as", "adam", "--problems", "nope-*"), "nope"),
    ):
        r = _cli("--rule", "broken_rules:TextbookAdam", *args)
        assert r.returncode == 2 and msg in r.stderr and "Traceback" not in r.stderr, (args, r.stderr)
