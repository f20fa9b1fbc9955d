"""Baseline files: round trip, atomic refusal to overwrite, validation messages."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.baseline import (
    SCHEMA,
    Baseline,
    CaseRecord,
    SeedRecord,
    dumps,
    load_baseline,
    parse_baseline,
    write_baseline,
)
from benchsuite.errors import UserError


def seed_record(seed: int = 0, iters=(10, 40), final_dist: float = 1e-5, status: str = "reached") -> SeedRecord:
    return SeedRecord(
        seed=seed,
        status=status,
        iters=tuple(iters),
        grad_calls=tuple(iters),
        final_measure=1e-9,
        final_dist=final_dist,
        iterations_run=max((i for i in iters if i is not None), default=100),
        fingerprint=(0.5, 0.25, 0.0625, 1.0 / 3.0),
    )


def case_record(key: str = "quad-a/full", seeds=(0,), iters_per_seed=None, oracle: str = "full") -> CaseRecord:
    iters_per_seed = iters_per_seed or [(10, 40)] * len(seeds)
    return CaseRecord(
        key=key,
        instance=key.split("/")[0],
        definition_hash="ab" * 32,
        x_tol=1e-3,
        rule="adam",
        rule_params=(("lr", 0.01),),
        hyperparams=(("beta1", 0.9), ("beta2", 0.999), ("eps", 1e-8), ("lr", 0.01)),
        oracle=oracle,
        batch=None if oracle == "full" else 10,
        replace=True,
        seeds=tuple(seeds),
        budget=1000,
        targets=(1e-2, 1e-6),
        measure="subopt",
        status="reached",
        outcomes=tuple(seed_record(s, it) for s, it in zip(seeds, iters_per_seed)),
    )


def baseline(*cases: CaseRecord) -> Baseline:
    return Baseline(cases=cases or (case_record(),), rule_label="adam(lr=0.01)", machine={"cpu": "test"})


def test_round_trip_is_exact(tmp_path: Path) -> None:
    b = baseline(case_record("quad-b/full"), case_record("quad-a/full"))
    path = write_baseline(b, tmp_path / "base.json")
    back = load_baseline(path)
    assert back.cases == tuple(sorted(b.cases, key=lambda c: c.key))  # sorted by key on write
    # floats are written with repr and read back bit for bit
    assert back.cases[0].outcomes[0].fingerprint[3] == 1.0 / 3.0
    assert back.source == str(path)


def test_file_is_diff_friendly(tmp_path: Path) -> None:
    text = dumps(baseline(case_record("z/full"), case_record("a/full")))
    data = json.loads(text)
    assert text.endswith("\n") and "\n  " in text  # indent 2
    assert [c["key"] for c in data["cases"]] == ["a/full", "z/full"]
    assert list(data) == sorted(data)  # sorted keys
    assert data["schema"] == SCHEMA


def test_non_finite_floats_are_strict_json(tmp_path: Path) -> None:
    c = case_record()
    diverged = SeedRecord(0, "diverged", (None, None), (None, None), math.inf, math.nan, 7, (1.0, math.inf))
    c = CaseRecord(**{**c.__dict__, "outcomes": (diverged,), "status": "diverged"})
    text = dumps(baseline(c))
    assert "NaN" not in text and "Infinity" not in text
    back = parse_baseline(json.loads(text))
    assert math.isinf(back.cases[0].outcomes[0].final_measure)
    assert math.isnan(back.cases[0].outcomes[0].final_dist)


def test_refuses_to_overwrite_without_force(tmp_path: Path) -> None:
    path = tmp_path / "base.json"
    write_baseline(baseline(), path)
    before = path.read_text()
    with pytest.raises(UserError, match="--force"):
        write_baseline(baseline(case_record("other/full")), path)
    assert path.read_text() == before
    write_baseline(baseline(case_record("other/full")), path, force=True)
    assert "other/full" in path.read_text()
    assert [p.name for p in tmp_path.iterdir()] == ["base.json"]  # no temporary left behind


def test_missing_file_and_bad_json(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="not found"):
        load_baseline(tmp_path / "nope.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{ not json")
    with pytest.raises(UserError, match=r"bad\.json: not valid JSON \(line 1"):
        load_baseline(bad)


@pytest.mark.parametrize(
    ("mutate", "field"),
    [
        (lambda d: d.pop("schema"), "schema: missing"),
        (lambda d: d.update(schema="other/9"), "schema: 'other/9' is not supported"),
        (lambda d: d["cases"][0].pop("definition_hash"), r"cases\[0\]\.definition_hash: missing"),
        (lambda d: d["cases"][0].update(budget=0), r"cases\[0\]\.budget: must be >= 1"),
        (lambda d: d["cases"][0].update(oracle="exact"), r"cases\[0\]\.oracle: 'exact' is not one of"),
        (lambda d: d["cases"][0]["outcomes"][0].update(iters=[1]), r"cases\[0\]\.outcomes\[0\]\.iters: has 1 entries"),
        (lambda d: d["cases"][0]["outcomes"][0].update(seed=3), r"cases\[0\]\.outcomes: seeds \[3\]"),
        (lambda d: d["cases"][0]["outcomes"][0]["fingerprint"].append("x"), r"cases\[0\]\.outcomes\[0\]\.fingerprint\[4\]: expected a number"),
        (lambda d: d.update(cases=[]), "cases: empty"),
    ],
)
def test_validation_names_the_field(tmp_path: Path, mutate, field: str) -> None:
    data = json.loads(dumps(baseline()))
    mutate(data)
    path = tmp_path / "b.json"
    path.write_text(json.dumps(data))
    with pytest.raises(UserError, match=rf"b\.json: {field}"):
        load_baseline(path)


@settings(max_examples=50, deadline=None)
@given(
    fp=st.lists(st.floats(allow_nan=False), min_size=0, max_size=12),
    lr=st.floats(min_value=1e-12, max_value=1e3),
)
def test_round_trip_property(fp: list[float], lr: float) -> None:
    """Any finite fingerprint and hyperparameter survives the file format exactly."""
    c = case_record()
    o = SeedRecord(**{**c.outcomes[0].__dict__, "fingerprint": tuple(fp), "checkpoints": tuple(range(1, len(fp) + 1))})
    c = CaseRecord(**{**c.__dict__, "outcomes": (o,), "hyperparams": (("lr", lr),)})
    back = parse_baseline(json.loads(dumps(baseline(c))))
    assert back.cases[0] == c


def test_cli_baseline_records_the_sweep_selection(tmp_path: Path) -> None:
    """--sweep: every grid point is run, the per-problem choice is what the baseline records."""
    import os
    import shutil
    import subprocess
    import sys

    repo = Path(__file__).resolve().parents[1]
    if (repo / "results" / "reference").is_dir():
        shutil.copytree(repo / "results" / "reference", tmp_path / "results" / "reference")
    out = subprocess.run(
        [sys.executable, "-m", "benchsuite", "baseline", "--rule", "gd", "--sweep", "lr=0.1,1.0,1.5",
         "--problems", "quad-diag-kappa10-d10,quad-diag-kappa100-d50", "--out", "b.json", "--jobs", "1"],
        cwd=tmp_path, capture_output=True, text=True, env=os.environ, check=False,
    )
    assert out.returncode == 0, out.stderr
    b = load_baseline(tmp_path / "b.json")
    lrs = {c.instance: c.hyperparams_dict()["lr"] for c in b.cases}
    # both quadratics have L = 1: lr = 1.5 < 2/L converges, and is the fastest of the three
    # values on kappa 10 (contraction max|1 - 1.5 lam| = 0.85 vs 0.9 for lr = 1)
    assert lrs["quad-diag-kappa10-d10"] == 1.5
    assert "selected lr=" in out.stdout
    assert all(c.rule_params == (("lr", lrs[c.instance]),) for c in b.cases)  # the selected grid point's spec
