"""Problems on real data (families/data.py): shipped scikit-learn sets, a user's files, the instance hash."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from benchsuite.catalogue import Instance, load_catalogue
from benchsuite.errors import UserError
from benchsuite.families import resolve_family
from benchsuite.families.data import LeastSquaresData, LogisticData, RidgeData, SoftmaxData

from derivatives import central_difference_grad

ROOT = Path(__file__).resolve().parent.parent


def test_registered_by_short_name():
    assert resolve_family("logistic_data") is LogisticData
    assert resolve_family("softmax_data") is SoftmaxData
    assert resolve_family("least_squares_data") is LeastSquaresData
    assert resolve_family("ridge_data") is RidgeData


def test_breast_cancer_logistic_matches_scikit_learn():
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression

    p = LogisticData(dataset="sklearn:breast_cancer", scale="standardize", lam=1e-2)
    X, y = load_breast_cancer(return_X_y=True)
    assert p.A64.shape == X.shape and set(np.unique(p.y64)) == {-1.0, 1.0}
    # scikit-learn LogisticRegression: C sum log(1 + exp(-y a.w)) + 1/2 ||w||^2 = ours / lam, C = 1/(n lam)
    sk = LogisticRegression(C=1.0 / (p.n_samples * p.lam), fit_intercept=False, tol=1e-12, max_iter=20000,
                            solver="lbfgs").fit(p.A64, p.y64).coef_.ravel()
    # sklearn's point is a near-stationary point of OUR objective: gradient near its 1e-8 stop
    assert np.linalg.norm(p.grad(sk)) <= 1e-6


def test_digits_softmax_matches_scikit_learn_multinomial():
    from sklearn.linear_model import LogisticRegression

    p = SoftmaxData(dataset="sklearn:digits", scale="standardize", lam=1e-1)
    assert (p.d, p.K, p.n_samples) == (64, 10, 1797)
    # scikit-learn multinomial LogisticRegression (lbfgs, no intercept): C sum_i CE_i + 1/2 ||W||_F^2,
    # ours / lam with C = 1/(n lam); coef_ is (K, d), ours W is (d, K)
    sk = LogisticRegression(C=1.0 / (p.n_samples * p.lam), fit_intercept=False, tol=1e-12,
                            max_iter=20000).fit(p.A64, p.labels).coef_
    g = p.grad(sk.T.ravel())
    # sklearn stops at a projected-gradient norm near 1e-8 of its own scaling (x lam here)
    assert np.linalg.norm(g) <= 1e-5


def test_diabetes_least_squares_and_ridge_match_scikit_learn():
    from sklearn.linear_model import LinearRegression, Ridge

    lsq = LeastSquaresData(dataset="sklearn:diabetes", scale="standardize", intercept=True)
    rid = RidgeData(dataset="sklearn:diabetes", scale="standardize", intercept=True, lam=1e-2)
    # scikit-learn LinearRegression (lstsq) and Ridge (Cholesky, alpha = n lam) on the same design
    ref_l = LinearRegression(fit_intercept=False).fit(lsq.A64, lsq.b64).coef_
    ref_r = Ridge(alpha=rid.n_samples * rid.lam, fit_intercept=False, solver="cholesky").fit(rid.A64, rid.b64).coef_
    # direct solves of the same problems, kappa <= 470: round-off times kappa
    np.testing.assert_allclose(lsq.closed_form(), ref_l, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(rid.closed_form(), ref_r, rtol=1e-10, atol=1e-10)
    c = lsq.constants()
    assert c.L_kind == "exact" and c.kappa == pytest.approx(np.linalg.cond(lsq.A64) ** 2, rel=1e-10)


def _svm(tmp_path: Path, n: int = 60, d: int = 12, seed: int = 0, labels=(-1, 1)) -> Path:
    rng = np.random.default_rng(seed)
    lines = []
    for i in range(n):
        cols = np.sort(rng.choice(d, size=3, replace=False)) + 1
        pairs = " ".join(f"{c}:{v:.6g}" for c, v in zip(cols, rng.standard_normal(3)))
        lines.append(f"{labels[i % len(labels)]} {pairs}")
    p = tmp_path / "u.svm"
    p.write_text("\n".join(lines) + "\n")
    return p


@pytest.mark.parametrize("cls, kw", [
    (LogisticData, {"lam": 0.05}),
    (SoftmaxData, {"lam": 0.05}),
    (RidgeData, {"lam": 0.05}),
    (LeastSquaresData, {}),
])
def test_gradient_on_a_sparse_user_file_matches_central_differences(tmp_path: Path, cls, kw):
    labels = (0, 1, 2) if cls is SoftmaxData else (-1, 1)
    p = cls(file=str(_svm(tmp_path, labels=labels)), intercept=True, scale="unit_rows", **kw)
    assert sp.issparse(p.A)  # SVM-light stays sparse
    x = np.random.default_rng(3).standard_normal(p.dim)
    # h = 1e-5: truncation ~1e-11, round-off ~1e-11 (|f| ~ 1); 1e-7 absolute leaves room
    np.testing.assert_allclose(p.grad(x), central_difference_grad(p.value, x, 1e-5), rtol=1e-6, atol=1e-7)
    f, g = p.value_and_grad(x, out=np.empty(p.dim))
    assert f == p.value(x)
    np.testing.assert_allclose(p.minibatch_grad(x, np.arange(p.n_samples)), g, rtol=1e-12, atol=1e-13)


def _catalogue(tmp_path: Path, data: Path, family: str = "logistic_data", extra: str = "") -> Path:
    cat = tmp_path / "mine.toml"
    cat.write_text(f"""
[[instance]]
name = "my-data"
family = "{family}"
targets = [1e-2, 1e-4]
budget = 500
[instance.params]
file = "{data}"
lam = 0.05
{extra}
""")
    return cat


def test_a_user_file_runs_as_an_instance_and_its_bytes_enter_the_hash(tmp_path: Path) -> None:
    data = _svm(tmp_path)
    inst = load_catalogue([_catalogue(tmp_path, data)])["my-data"]
    h1, d1 = inst.problem_hash(), inst.definition_hash()
    p = inst.build()
    assert p.n_samples == 60
    data.write_text(data.read_text().replace("-1 ", "1 ", 1).replace("\n1 ", "\n-1 ", 1))
    assert inst.problem_hash() != h1 and inst.definition_hash() != d1  # edited file: a new problem


def test_certified_optimum_of_a_user_csv(tmp_path: Path) -> None:
    from benchsuite.optimum import certified_optimum

    rng = np.random.default_rng(1)
    X = rng.standard_normal((80, 4))
    y = (X @ [1.0, -2.0, 0.5, 0.0] + 0.3 * rng.standard_normal(80) > 0).astype(int)
    csv = tmp_path / "d.csv"
    csv.write_text("a,b,c,d,label\n" + "\n".join(",".join(f"{v:.17g}" for v in r) + f",{t}" for r, t in zip(X, y)))
    inst = load_catalogue([_catalogue(tmp_path, csv)])["my-data"]
    o = certified_optimum(inst, cache_dir=tmp_path / "ref")
    assert o.certified, o.reason


@pytest.mark.parametrize("text, words", [
    ("+1 1:0.5\n-1 2:oops\n", "u.svm: line 2: non-numeric value 'oops' for feature 2"),
    ("+1 1:0.5\n-1 0:1\n", "u.svm: line 2: feature index 0 <= 0"),
    ("+1 1:0.5\n0 2:1\n-1 1:1\n", "u.svm: line 3: label -1 mixes label sets"),
    ("", "u.svm: line 1: empty file"),
    ("+1 1:0.5\n-1 2:\n", "u.svm: line 2: truncated or malformed pair"),
])
def test_bad_user_file_is_one_line_with_exit_code_2(tmp_path: Path, text: str, words: str) -> None:
    data = tmp_path / "u.svm"
    data.write_text(text)
    cat = _catalogue(tmp_path, data)
    with pytest.raises(UserError, match=words.replace("(", r"\(")):
        load_catalogue([cat])["my-data"].build()
    proc = subprocess.run([sys.executable, "-m", "benchsuite", "optimum", "my-data", "--catalogue", str(cat),
                           "--cache-dir", str(tmp_path / "ref")], capture_output=True, text=True, cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and words.split(": ", 1)[1] in lines[0] and "Traceback" not in proc.stderr


def test_bad_params(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="exactly one of 'file'"):
        LogisticData()
    with pytest.raises(ValueError, match="unknown dataset"):
        LogisticData(dataset="sklearn:iris-nope")
    with pytest.raises(ValueError, match="scale must be one of"):
        RidgeData(dataset="sklearn:diabetes", scale="minmax")
    with pytest.raises(ValueError, match="would make sparse data dense"):
        RidgeData(file=str(_svm(tmp_path)), scale="standardize")


def test_shipped_instances_name_their_source_and_are_certified() -> None:
    cat = load_catalogue()
    names = ["data-breast-cancer-logreg", "data-digits-softmax", "data-diabetes-lsq", "data-diabetes-ridge"]
    text = (ROOT / "problems" / "data.toml").read_text()
    for name in names:
        inst = cat[name]
        # the source is named beside the instance, in the catalogue file
        block = text[text.index(f'name = "{name}"') - 400:text.index(f'name = "{name}"')]
        assert "source:" in block, name
        assert inst.family_class().data_digest(inst.params_dict()) is not None


def test_digest_without_importing_scikit_learn() -> None:
    code = ("import sys; from benchsuite.families.data import _digest; "
            "d = _digest({'dataset': 'sklearn:diabetes'}); print(d is not None, 'sklearn' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert out == ["True", "False"]


def test_instance_build_keeps_the_location_for_bad_params(tmp_path: Path) -> None:
    inst = Instance(name="x", family="ridge_data", params=(("dataset", "sklearn:diabetes"), ("lam", -1.0)),
                    tier="small", targets=(1e-2,), budget=10, source="f.toml")
    with pytest.raises(UserError, match=r"f.toml: \[x\].params: lam must be > 0"):
        inst.build()


def test_missing_scikit_learn_is_one_line(monkeypatch: pytest.MonkeyPatch) -> None:
    import importlib.util

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "sklearn" else real(name, *a))
    inst = load_catalogue()["data-diabetes-ridge"]
    with pytest.raises(UserError, match=r"data.toml: \[data-diabetes-ridge\].params: dataset 'sklearn:diabetes' "
                                        r"needs scikit-learn, which is not installed \(pip install scikit-learn\)"):
        inst.build()
