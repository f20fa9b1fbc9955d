"""Command-line tests for `benchsuite list` and `benchsuite optimum`: output, exit codes, lazy imports."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
MISRA1A = ROOT / "benchsuite" / "data" / "strd" / "Misra1a.dat"


def cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "benchsuite", *args], capture_output=True, text=True,
                          cwd=cwd or ROOT, timeout=300)


def imported_after(argv: list[str], cwd: Path) -> set[str]:
    """Top-level modules imported by running the CLI with ``argv`` in a fresh interpreter."""
    code = textwrap.dedent(f"""
        import sys, io, contextlib
        from benchsuite.cli import main
        with contextlib.redirect_stdout(io.StringIO()):
            try:
                main({argv!r})
            except SystemExit:
                pass
        print(" ".join(sorted({{m.split(".")[0] for m in sys.modules}})))
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=cwd, timeout=300)
    assert out.returncode == 0, out.stderr
    return set(out.stdout.split())


@pytest.mark.parametrize("argv", [["--help"], ["list", "--problems", "quad-*,mgh-beale,rosenbrock-2d"]])
def test_help_and_list_do_not_import_cvxpy(argv: list[str], tmp_path: Path) -> None:
    mods = imported_after(argv + (["--cache-dir", str(tmp_path)] if argv[0] == "list" else []), tmp_path)
    assert "benchsuite" in mods
    assert not mods & {"cvxpy", "torch", "sklearn", "statsmodels", "matplotlib"}


@pytest.mark.parametrize("argv", [["--help"], ["report", "--help"], ["runs"], ["runs", "--help"]])
def test_help_and_runs_do_not_import_plotting(argv: list[str], tmp_path: Path) -> None:
    """`benchsuite --help` stays fast: matplotlib (and tqdm, pandas) are imported only by what draws or reads tables."""
    mods = imported_after(argv, tmp_path)
    assert "benchsuite" in mods
    assert not mods & {"matplotlib", "tqdm", "pandas", "PIL"}


def test_list_table_and_json(tmp_path: Path) -> None:
    r = cli("list", "--tier", "small", "--problems", "quad-*", "--cache-dir", str(tmp_path))
    assert r.returncode == 0, r.stderr
    assert "quad-rot-kappa1e3-d100" in r.stdout and "1e+03 exact" in r.stdout
    assert "quad-rot-linear-kappa1e4-d200" not in r.stdout  # medium tier filtered out by the glob
    r = cli("list", "--problems", "quad-rot-kappa1e3-d100", "--json", "--cache-dir", str(tmp_path))
    [row] = json.loads(r.stdout)
    assert row["dim"] == 100 and row["n_samples"] is None and row["convex"] is True
    assert (row["L"], row["mu"], row["kappa"]) == (1.0, 1e-3, 1000.0)  # by construction of the instance
    assert row["kappa_kind"] == "exact" and row["certified"] is False  # empty cache folder


def test_optimum_json_then_list_says_certified(tmp_path: Path) -> None:
    r = cli("optimum", "quad-diag-kappa100-d50", "--json", "--cache-dir", str(tmp_path))
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    for key in ("name", "f_star", "x_star", "methods", "grad_norm", "certified", "how", "routes", "agreement_digits"):
        assert key in doc
    assert doc["name"] == "quad-diag-kappa100-d50" and doc["certified"] is True
    assert len(doc["x_star"]) == 50  # whole, not abbreviated
    assert "closed-form" in doc["methods"] and "cvxpy/CLARABEL" in doc["methods"]
    assert "published" not in doc  # nothing published for a generated quadratic
    r = cli("list", "--problems", "quad-diag-kappa100-d50", "--json", "--cache-dir", str(tmp_path))
    assert json.loads(r.stdout)[0]["certified"] is True
    text = cli("optimum", "quad-diag-kappa100-d50", "--cache-dir", str(tmp_path))
    assert text.returncode == 0 and "CERTIFIED [from cache]" in text.stdout
    assert "..., " in text.stdout  # x* abbreviated in the table form


def test_optimum_strd_path_gives_published_and_lre(tmp_path: Path) -> None:
    r = cli("optimum", str(MISRA1A), "--json", "--cache-dir", str(tmp_path))
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    # NIST StRD certified values for Misra1a
    assert doc["published"]["x"] == [2.3894212918e02, 5.5015643181e-04]
    assert doc["published"]["f"] == 1.2455138894e-01
    assert doc["lre"] >= 6 and doc["lre"] == doc["lre_per_parameter"]["min"]
    assert doc["x_star"][0] == pytest.approx(2.3894212918e02, rel=1e-9)  # the certified value has 11 digits
    # strict JSON: an unknown number (kappa of a problem that is not strongly convex) is null, not "nan" or NaN
    json.loads(r.stdout, parse_constant=lambda c: pytest.fail(f"non-standard JSON constant {c}"))
    assert doc["tolerances"]["kappa"] is None and '"nan"' not in r.stdout and '"inf"' not in r.stdout


def test_not_certified_exits_1_and_says_why(tmp_path: Path) -> None:
    (tmp_path / "badfam.py").write_text(textwrap.dedent("""
        from benchsuite.families.quadratic import Quadratic
        class Shifted(Quadratic):
            def cvxpy_objective(self, x):
                import cvxpy as cp
                return 0.5 * cp.sum(cp.multiply(self.eigenvalues, cp.square(x - self.x_star - 0.1)))
    """))
    (tmp_path / "cat.toml").write_text(textwrap.dedent("""
        [[instance]]
        name = "shifted-cvxpy"
        family = "badfam:Shifted"
        targets = [1e-2]
        budget = 10
        [instance.params]
        d = 4
    """))
    r = cli("optimum", "shifted-cvxpy", "--catalogue", "cat.toml", "--cache-dir", "cache", cwd=tmp_path)
    assert r.returncode == 1
    assert "NOT CERTIFIED" in r.stdout and "disagree" in r.stdout
    assert "not certified: shifted-cvxpy" in r.stderr and "Traceback" not in r.stderr


BAD_FILES = {
    "malformed": ('[[instance]]\nname = "a"\nfamily = \n', "line 3"),
    "unknown-family": ('[[instance]]\nname = "a"\nfamily = "nope"\ntargets = [1e-2]\nbudget = 1\n', "unknown family"),
    "unknown-param": ('[[instance]]\nname = "a"\nfamily = "quadratic"\ntargets = [1e-2]\nbudget = 1\n'
                      '[instance.params]\ndd = 3\n', "no parameter 'dd'"),
    "missing-field": ('[[instance]]\nname = "a"\nfamily = "quadratic"\ntargets = [1e-2]\n', "'budget'"),
    "impossible-size": ('[[instance]]\nname = "a"\nfamily = "quadratic"\ntargets = [1e-2]\nbudget = 1\n'
                        '[instance.params]\nd = -3\n', "[a].params"),
}


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_catalogue_exit_2_one_line(case: str, tmp_path: Path) -> None:
    text, fragment = BAD_FILES[case]
    (tmp_path / "bad.toml").write_text(text)
    command = "optimum" if case == "impossible-size" else "list"  # sizes are checked when the problem is built
    args = [command, "a"] if command == "optimum" else [command]
    r = cli(*args, "--catalogue", "bad.toml", "--cache-dir", "cache", cwd=tmp_path)
    assert r.returncode == 2, (r.stdout, r.stderr)
    assert "Traceback" not in r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "bad.toml" in lines[0] and fragment in lines[0], lines


@pytest.mark.parametrize("args,fragment", [
    (["optimum", "quad-rot-kappa1e3-d10"], "close matches: quad-rot-kappa1e3-d100"),
    (["optimum", "nowhere/Missing.dat"], "not found"),
    (["list", "--problems", "zzz*"], "matches no instance"),
])
def test_bad_names_exit_2(args: list[str], fragment: str, tmp_path: Path) -> None:
    r = cli(*args, "--cache-dir", str(tmp_path))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert fragment in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_strd_file_without_certified_block_exit_2(tmp_path: Path) -> None:
    data = MISRA1A.read_bytes()
    bad = tmp_path / "NoCert.dat"
    bad.write_bytes(data[: data.index(b"Certified Values")])  # the file up to its certified block
    r = cli("optimum", str(bad), "--cache-dir", str(tmp_path))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "NoCert.dat" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_help_lists_exit_codes() -> None:
    top = cli("--help")
    assert top.returncode == 0 and "143 terminated (SIGTERM)" in " ".join(top.stdout.split())
    run = cli("run", "--help")
    text = " ".join(run.stdout.split())
    for fragment in ("0 every case ran cleanly", "1 some case ended error, timeout or diverged, or unstable with --strict",
                     "2 usage error", "130 interrupted (Ctrl-C); 143 terminated (SIGTERM)",
                     "Writes ./results/runs/<run-id>/", "--replays N"):
        assert fragment in text, fragment
    assert "--repeats" not in text


def test_packaging_declares_every_package_and_data_file() -> None:
    """Every folder of the package that holds files is a declared package, and every data file matches a glob.

    A wheel ships exactly this (checked by hand with ``pip wheel . --no-deps``); an undeclared folder is
    left out of the wheel and makes setuptools print a long warning.
    """
    import fnmatch
    import tomllib

    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    packages = set(conf["packages"])
    globs = conf.get("package-data", {})
    pkg_root = ROOT / "benchsuite"
    missing = []
    for f in sorted(pkg_root.rglob("*")):
        if not f.is_file() or "__pycache__" in f.parts or f.suffix == ".pyc":
            continue
        package = ".".join(f.parent.relative_to(ROOT).parts)
        if package not in packages:
            missing.append(f"{package} (holds {f.name}) is not in [tool.setuptools] packages")
        elif f.suffix != ".py" and not any(fnmatch.fnmatchcase(f.name, g) for g in globs.get(package, [])):
            missing.append(f"{f.relative_to(ROOT)} matches no package-data glob of {package}")
    assert not missing, missing
    strd = pkg_root / "data" / "strd"
    assert (strd / "ERRATA.md").is_file() and len(list(strd.glob("*.dat"))) >= 10
