"""Catalogue files: parsing, validation at the boundary, hashes and selection."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.catalogue import Instance, builtin_dir, instance_from_strd, load_catalogue, select
from benchsuite.errors import UserError

GOOD = """
[[instance]]
name = "q-small"
family = "quadratic"
targets = [1e-2, 1e-4]
budget = 100
[instance.params]
d = 5
L = 2.0
mu = 0.5
seed = 7

[[instance]]
name = "q-medium"
family = "quadratic"
tier = "medium"
targets = [1e-2]
budget = 10
measure = "dist"
x_tol = 0.01
[instance.params]
d = 8
eigenvalues = [1, 2, 3, 4, 5, 6, 7, 8]
"""

STRD_DIR = Path(__file__).resolve().parents[1] / "benchsuite" / "data" / "strd"


def write(tmp_path: Path, text: str, name: str = "cat.toml") -> Path:
    p = tmp_path / name
    p.write_text(textwrap.dedent(text))
    return p


def entry(**fields: object) -> str:
    """One [[instance]] table from fields (params as a dict)."""
    base: dict[str, object] = {"name": "x", "family": "quadratic", "targets": [1e-2], "budget": 10}
    base.update(fields)
    params = base.pop("params", {"d": 3})
    lines = ["[[instance]]"]
    for k, v in base.items():
        if v is None:
            continue
        lines.append(f"{k} = {toml_value(v)}")
    if params is not None:
        lines.append("[instance.params]")
        lines += [f"{k} = {toml_value(v)}" for k, v in params.items()]  # type: ignore[union-attr]
    return "\n".join(lines) + "\n"


def toml_value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return f'"{v}"'
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return repr(v)


def only_extra(tmp_path: Path, text: str, monkeypatch: pytest.MonkeyPatch) -> dict[str, Instance]:
    """Load a catalogue made of one extra file only (built-in folder hidden)."""
    monkeypatch.setattr("benchsuite.catalogue.builtin_dir", lambda: tmp_path / "none")
    monkeypatch.delenv("BENCHSUITE_CATALOGUE", raising=False)
    return load_catalogue([write(tmp_path, text)])


# -- the good path -------------------------------------------------------------
def test_parse_fields_and_defaults(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cat = only_extra(tmp_path, GOOD, monkeypatch)
    assert list(cat) == ["q-small", "q-medium"]
    a, b = cat["q-small"], cat["q-medium"]
    assert a.tier == "small" and a.measure == "subopt" and a.x_tol == 1e-3
    assert a.targets == (1e-2, 1e-4) and a.budget == 100
    assert a.params == (("L", 2.0), ("d", 5), ("mu", 0.5), ("seed", 7))  # sorted by key
    assert b.params_dict()["eigenvalues"] == [1, 2, 3, 4, 5, 6, 7, 8]  # tuple in the instance, list for the family
    assert b.params == (("d", 8), ("eigenvalues", (1, 2, 3, 4, 5, 6, 7, 8)))
    assert hash(a) != hash(b)  # frozen and hashable, lists stored as tuples
    p = a.build()
    assert p.dim == 5 and p.constants().L == 2.0 and p.constants().mu == 0.5
    assert a.build(dtype="float32").dtype.name == "float32"


def test_builtin_catalogue_is_the_repository_folder() -> None:
    assert builtin_dir() == Path(__file__).resolve().parents[1] / "problems"
    cat = load_catalogue()
    assert "quad-rot-kappa1e3-d100" in cat
    assert all(i.source.endswith(".toml") for i in cat.values())


def test_env_var_adds_files(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    f = write(tmp_path, GOOD)
    monkeypatch.setenv("BENCHSUITE_CATALOGUE", str(f))
    cat = load_catalogue()
    assert "q-small" in cat and "quad-rot-kappa1e3-d100" in cat


def test_load_does_not_build(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # d = 10**9 would need terabytes if built; loading only checks names and types
    cat = only_extra(tmp_path, entry(name="huge", params={"d": 10**9}), monkeypatch)
    assert cat["huge"].params_dict() == {"d": 10**9}


def test_user_family_by_import_path(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "myfam.py").write_text(textwrap.dedent("""
        import numpy as np
        from benchsuite.problem import Problem
        class Shifted(Problem):
            family = "shifted"
            def __init__(self, d=2, c=1.0):
                self.dim = d; self.c = c
            def value(self, x): return float(((x - self.c) ** 2).sum())
            def grad(self, x, out=None): return 2 * (x - self.c)
            def initial_point(self): return np.zeros(self.dim)
    """))
    cat = only_extra(tmp_path, entry(name="mine", family="myfam:Shifted", params={"d": 4, "c": 3.0}), monkeypatch)
    p = cat["mine"].build()
    assert p.dim == 4 and p.value(p.initial_point()) == 36.0


# -- hashes ------------------------------------------------------------------------
def test_hashes_stable_and_sensitive(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    a = only_extra(tmp_path, GOOD, monkeypatch)["q-small"]
    again = only_extra(tmp_path, GOOD, monkeypatch)["q-small"]
    assert a.problem_hash() == again.problem_hash() and len(a.problem_hash()) == 64
    renamed = Instance(**{**a.__dict__, "name": "other", "tier": "large", "source": "elsewhere"})
    assert renamed.problem_hash() == a.problem_hash()
    assert renamed.definition_hash() == a.definition_hash()  # name, source and tier are not part of it
    changed = Instance(**{**a.__dict__, "params": (("L", 2.0), ("d", 5), ("mu", 0.5), ("seed", 8))})
    assert changed.problem_hash() != a.problem_hash()
    run_changed = Instance(**{**a.__dict__, "budget": 101})
    assert run_changed.problem_hash() == a.problem_hash()
    assert run_changed.definition_hash() != a.definition_hash()


@settings(max_examples=50, deadline=None)
@given(st.dictionaries(st.text("abcdefgh", min_size=1, max_size=4),
                       st.one_of(st.integers(-10**6, 10**6), st.floats(allow_nan=False, allow_infinity=False),
                                 st.text(max_size=5), st.booleans()), max_size=5))
def test_problem_hash_independent_of_key_order(params: dict) -> None:
    items = sorted(params.items())
    a = Instance("n", "quadratic", tuple(items), "small", (1e-2,), 10)
    b = Instance("n", "quadratic", tuple(sorted(reversed(items))), "small", (1e-2,), 10)
    assert a.problem_hash() == b.problem_hash()


# -- bad input: one line naming file, instance, field --------------------------------
BAD_CASES = [
    # (file text, fragments the message must contain)
    ('[[instance]]\nname = "a"\nfamily = \n', ["malformed TOML", "line 3"]),
    (entry(family=None), ["[x]", "missing required field 'family'"]),
    (entry(budget=None), ["missing required field 'budget'"]),
    (entry(targets=None), ["missing required field 'targets'"]),
    (entry(colour="red"), ["[x].colour", "unknown field"]),
    (entry(budget="10"), ["[x].budget", "expected an integer", "string"]),
    (entry(budget=1.5), ["[x].budget", "expected an integer"]),
    (entry(budget=0), ["[x].budget", "> 0"]),
    (entry(targets=[1e-2, 1e-2]), ["[x].targets", "strictly decreasing"]),
    (entry(targets=[1e-4, 1e-2]), ["[x].targets", "strictly decreasing"]),
    (entry(targets=[1e-2, 0.0]), ["[x].targets", "> 0"]),
    (entry(targets=[1e-2, -1.0]), ["[x].targets", "> 0"]),
    # every measure is 1 at the start: a target of 1 or more is met before the first step
    (entry(targets=[1.0, 1e-2]), ["[x].targets", "> 0 and < 1", "got 1.0"]),
    (entry(targets=[5, 1e-2]), ["[x].targets", "> 0 and < 1", "got 5"]),
    ("# no instances yet\n", ["no [[instance]] table", "defines no instance"]),
    ("instance = []\n", ["no [[instance]] table"]),
    (entry(tier="huge"), ["[x].tier", "unknown tier 'huge'"]),
    (entry(measure="speed"), ["[x].measure", "unknown measure 'speed'"]),
    (entry(x_tol=-1.0), ["[x].x_tol", "> 0"]),
    (entry(family="nonesuch"), ["[x].family", "unknown family 'nonesuch'"]),
    (entry(family="no_such_module_xyz:Cls"), ["[x].family", "cannot import"]),
    (entry(params={"d": 3, "dimension": 4}), ["[x].params", "'dimension'", "accepted: d, L, mu"]),
    (entry(name="has space"), ["name", "without spaces"]),
    ('[[instance]]\nname = "x"\nfamily = "quadratic"\ntargets = [1e-2]\nbudget = 1\n[instance.params]\nd = {a = 1}\n',
     ["[x].params.d", "nested tables"]),
    ('[problem]\nname = "x"\n', ["unknown top-level key 'problem'"]),
]


@pytest.mark.parametrize("text,fragments", BAD_CASES)
def test_bad_input_is_one_line_naming_the_place(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, text: str, fragments: list[str]
) -> None:
    with pytest.raises(UserError) as info:
        only_extra(tmp_path, text, monkeypatch)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith(str(tmp_path / "cat.toml")) or msg.startswith("cat.toml")
    for frag in fragments:
        assert frag in msg, (frag, msg)


def test_duplicate_names_name_both_files(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("benchsuite.catalogue.builtin_dir", lambda: tmp_path / "none")
    a = write(tmp_path, entry(name="twice"), "a.toml")
    b = write(tmp_path, entry(name="twice"), "b.toml")
    with pytest.raises(UserError, match=r"b\.toml: \[twice\]\.name: duplicate.*a\.toml"):
        load_catalogue([a, b])


def test_constructor_value_error_gets_the_location(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cat = only_extra(tmp_path, entry(name="neg", params={"d": 3, "L": 1.0, "mu": 2.0}), monkeypatch)
    with pytest.raises(UserError) as info:
        cat["neg"].build()
    msg = str(info.value)
    assert "cat.toml: [neg].params:" in msg and "mu" in msg and "\n" not in msg


def test_missing_path_is_a_user_error(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="not found"):
        load_catalogue([tmp_path / "nope.toml"])


# -- selection --------------------------------------------------------------------
def test_select_tier_names_globs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cat = only_extra(tmp_path, GOOD, monkeypatch)
    assert [i.name for i in select(cat)] == ["q-small"]  # default tier small
    assert [i.name for i in select(cat, tier="medium")] == ["q-medium"]
    assert [i.name for i in select(cat, tier=None)] == ["q-small", "q-medium"]
    assert [i.name for i in select(cat, "q-*", tier=None)] == ["q-small", "q-medium"]
    assert [i.name for i in select(cat, "q-*")] == ["q-small"]  # globs respect the tier
    assert [i.name for i in select(cat, "q-medium")] == ["q-medium"]  # an exact name does not
    assert [i.name for i in select(cat, "q-medium, q-small,q-medium")] == ["q-medium", "q-small"]
    with pytest.raises(UserError, match="close matches: q-small"):
        select(cat, "q-smal")
    with pytest.raises(UserError, match="matches no instance"):
        select(cat, "z*")
    with pytest.raises(UserError, match="unknown tier"):
        select(cat, tier="tiny")


def test_select_strd_path() -> None:
    path = STRD_DIR / "Misra1a.dat"
    [inst] = select({}, str(path))
    assert inst.family == "nist_strd" and inst.name == "Misra1a-start1"
    assert inst.params_dict() == {"file": str(path.resolve()), "start": 1}
    p = inst.build()
    assert p.dim == 2
    # NIST StRD Misra1a, start 1 is b = (500, 1e-4) (the file's "Start 1" column)
    assert list(p.initial_point()) == [500.0, 1e-4]
    two = instance_from_strd(path, start=2)
    assert two.problem_hash() != inst.problem_hash()


def test_strd_bad_files(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="not found"):
        instance_from_strd(tmp_path / "missing.dat")
    junk = tmp_path / "junk.dat"
    junk.write_text("this is not a StRD file\n")
    with pytest.raises(UserError) as info:
        instance_from_strd(junk)
    assert "junk.dat" in str(info.value) and "\n" not in str(info.value)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(min_value=-1.0, max_value=2.0, allow_nan=False, allow_infinity=False), min_size=1, max_size=5),
       st.integers(-3, 3))
def test_targets_and_budget_accepted_exactly_when_valid(targets: list[float], budget: int) -> None:
    """Law: an entry loads iff targets are in (0, 1) and strictly decreasing and budget > 0."""
    import tempfile

    valid = all(0 < t < 1 for t in targets) and all(b < a for a, b in zip(targets, targets[1:])) and budget > 0
    with tempfile.TemporaryDirectory() as d:
        f = Path(d) / "t.toml"
        f.write_text(entry(targets=targets, budget=budget))
        try:
            cat = load_catalogue([f])
        except UserError as exc:
            assert not valid, str(exc)
            assert "\n" not in str(exc) and ("targets" in str(exc) or "budget" in str(exc))
        else:
            assert valid
            assert cat["x"].targets == tuple(targets) and cat["x"].budget == budget


def test_an_empty_catalogue_folder_is_one_line(tmp_path: Path) -> None:
    (tmp_path / "empty").mkdir()
    with pytest.raises(UserError, match=r"empty: no catalogue files \(\*\.toml\) in this folder$"):
        load_catalogue([tmp_path / "empty"])


def test_where_each_instance_came_from(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cat = load_catalogue([write(tmp_path, GOOD)])
    assert cat["q-small"].catalogue == str(tmp_path / "cat.toml") and not cat["q-small"].builtin
    assert cat["quad-diag-kappa10-d10"].catalogue == "builtin" and cat["quad-diag-kappa10-d10"].builtin
    monkeypatch.chdir(tmp_path)
    assert load_catalogue(["cat.toml"])["q-small"].catalogue == "cat.toml"  # the path as given
    assert instance_from_strd(STRD_DIR / "Misra1a.dat").catalogue == str(STRD_DIR / "Misra1a.dat")


def test_selection_errors_name_what_the_caller_gave(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cat = only_extra(tmp_path, GOOD, monkeypatch)
    with pytest.raises(UserError, match=r"^--problems: unknown instance 'q-smal'"):
        select(cat, "q-smal")  # the command line's default
    with pytest.raises(UserError, match=r"^NAME_OR_PATH: unknown instance 'q-smal'; close matches: q-small$"):
        select(cat, "q-smal", option="NAME_OR_PATH")
    with pytest.raises(UserError, match=r"^problems='z\*': 'z\*' matches no instance$"):
        select(cat, "z*", option="problems='z*'")
    with pytest.raises(UserError, match=r"^tier='tiny': unknown tier 'tiny'"):
        select(cat, tier="tiny", tier_option="tier='tiny'")


# -- x_tol against each family's stated rule (problems/*.toml headers) ----------------------
#: families whose header states x_tol >= sqrt(kappa t_min) (measure subopt), from
#: mu/2 ||e||^2 <= f - f* <= t (f0 - f*) <= t L/2 ||e0||^2 (closed form); for measure dist the
#: rule is t_min itself, for gradnorm kappa t_min (mu ||e|| <= ||g||, ||g0|| <= L ||e0||)
KAPPA_RULE = frozenset({"quadratic", "least_squares", "ridge", "logistic", "softmax", "huber",
                        # large and real-data families (problems/large.toml, problems/data.toml headers)
                        "logistic_sparse", "ridge_sparse", "logistic_data", "softmax_data",
                        "least_squares_data", "ridge_data"})
#: non-convex (or mu = 0) families whose header states the local rule from the Hessian at x*:
#: ||x - x*|| ~ sqrt(2 t (f0 - f*) / lambda_min(H*)), relative to ||x0 - x*|| (second-order model)
LOCAL_RULE = frozenset({"rosenbrock", "huber"})
#: families whose x_tol is measured (header: gradient-descent runs, distance quoted per entry,
#: a factor 2-3 over it), or, for Longley, sqrt(kappa t) > 1 gives no distance claim at all
MEASURED = frozenset({"mgh", "nist_strd", "longley"})


def _x_tol_rule(inst: Instance) -> tuple[float, str] | None:
    """The distance the family's rule allows after the tightest target, and which rule (None: measured)."""
    import math

    import numpy as np

    from benchsuite.optimum import certified_optimum

    if inst.family in MEASURED:
        return None
    problem = inst.build()
    c = problem.constants()
    t = min(inst.targets)
    if inst.family in KAPPA_RULE and c.L and c.mu and c.mu > 0:
        kappa = c.L / c.mu
        return {"subopt": math.sqrt(kappa * t), "dist": t, "gradnorm": kappa * t}[inst.measure], "kappa"
    assert inst.family in LOCAL_RULE and inst.measure == "subopt", inst.name
    opt = certified_optimum(inst)  # the committed reference cache
    xs = np.asarray(opt.x_star, dtype=np.float64)
    H = np.array([problem.hessp(xs, e) for e in np.eye(problem.dim)])
    lam_min = float(np.linalg.eigvalsh(0.5 * (H + H.T))[0])
    x0 = problem.initial_point().astype(np.float64)
    return math.sqrt(2 * t * (problem.value(x0) - opt.f_star) / lam_min) / float(np.linalg.norm(x0 - xs)), "local"


def test_every_family_states_an_x_tol_rule() -> None:
    families = {i.family for i in load_catalogue().values() if i.source.endswith(".toml")}
    assert families <= KAPPA_RULE | LOCAL_RULE | MEASURED, families - (KAPPA_RULE | LOCAL_RULE | MEASURED)


@pytest.mark.parametrize("name", sorted(n for n, i in load_catalogue().items() if i.family not in MEASURED))
def test_x_tol_follows_the_family_rule(name: str) -> None:
    inst = load_catalogue()[name]
    got = _x_tol_rule(inst)
    assert got is not None
    rule, kind = got
    assert 0 < rule < 1
    # never tighter than the rule: a correct rule that meets t_min may end anywhere within it
    # (1e-9: the rule is rounded up to two digits in the files, never down)
    assert inst.x_tol >= rule * (1 - 1e-9), (name, inst.x_tol, rule)
    if kind == "kappa":
        # and not much looser (x_tol is the rule rounded up, at most 2x): a looser one lets a
        # rule that stops far from x* through the gate's distance check
        assert inst.x_tol <= 2 * rule, (name, inst.x_tol, rule)
