"""The run report: content and order of the page, self-containment, markdown, and a real headless browser."""

from __future__ import annotations

import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from benchsuite.cli import main
from benchsuite.htmlreport import build_report, render_html
from benchsuite.runs import NO_TRACES, open_run

import browser  # tests/ is on sys.path: pytest prepends the folder of each test module
import runfolders


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, str]:
    """A results folder with one real run twice: as recorded (with traces) and as an older run without them."""
    out = tmp_path_factory.mktemp("results")
    traced = runfolders.real_run(out)
    plain = "00-recorded-before-traces"
    shutil.copytree(out / "runs" / traced, out / "runs" / plain)
    shutil.rmtree(out / "runs" / plain / "traces")
    return out, plain, traced


@pytest.fixture(scope="module")
def page(runs: tuple[Path, str, str], tmp_path_factory: pytest.TempPathFactory) -> Path:
    out, _, traced = runs
    path = tmp_path_factory.mktemp("page") / "report.html"
    assert main(["report", traced, "--out", str(out), "--html", str(path), "--quiet"]) == 0
    return path


def test_page_order_and_content(runs: tuple[Path, str, str], page: Path) -> None:
    out, _, traced = runs
    text = page.read_text()
    heads = [text.index(f'<h2 id="{s}">') for s in ("summary", "profiles", "problems", "provenance")]
    assert heads == sorted(heads)  # summary first, then profiles, per-problem curves, provenance
    run = open_run(out, traced)
    # 3 profile figures (iterations, time, data) + one curve figure per problem
    assert text.count("<img ") == 3 + 2
    assert "quad-diag-kappa10-d10" in text and "quad-diag-kappa100-d50" in text
    # the table cell of gd's first target is the stored count
    gd = run.frame[(run.frame["rule"] == "gd") & (run.frame["instance"] == "quad-diag-kappa10-d10")]
    k = int(gd[gd["target_index"] == 0]["iterations"].iloc[0])
    lower = run.cases[gd["case"].iloc[0]].get("theory_lower") or [None]
    cell = (re.escape(f"{k} (&gt;= {lower[0]}, &lt;= ") + r"\d+\)" if lower[0] is not None
            else re.escape(f"{k}") + r"( \(&lt;= \d+\))?")  # the lower bound, where the run has one
    assert re.search(rf"<td>gd</td><td>reached</td><td class=\"num\">{cell}</td>", text)
    commit = run.meta["git"]["commit"]
    if commit:
        assert commit in text
    assert "certified" in text and "closed-form" in text  # the quadratics' cached certificates
    assert "Moré &amp; Wild" in text and "(d + 1)" in text  # the data profile caption states the normalisation


def test_page_is_self_contained(page: Path) -> None:
    text = page.read_text()
    refs = re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', text)
    assert refs and all(r.startswith(("data:image/png;base64,", "#")) for r in refs)
    for fetcher in ("<link", "@import", "url(", "http://", "https://", "<iframe", "fetch("):
        assert fetcher not in text


def test_run_without_traces_has_tables_and_says_why(runs: tuple[Path, str, str], tmp_path: Path) -> None:
    out, plain, _ = runs
    report = build_report(open_run(out, plain))
    assert all(p.figure is None for p in report.problems) and len(report.problems) == 2
    assert all(NO_TRACES in p.note for p in report.problems)
    assert all(p.table.rows for p in report.problems)
    html = render_html(report)
    assert NO_TRACES in html and html.count("<img ") == 3  # profiles come from the table alone


def test_markdown_with_pngs_beside(runs: tuple[Path, str, str], tmp_path: Path) -> None:
    out, _, traced = runs
    md = tmp_path / "pr" / "comment.md"
    assert main(["report", traced, "--out", str(out), "--markdown", str(md), "--quiet"]) == 0
    text = md.read_text()
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", text)
    assert len(links) == 5 and all(l.startswith("comment-figures/") for l in links)
    for link in links:
        assert (md.parent / link).read_bytes().startswith(b"\x89PNG")
    assert oct((md.parent / links[0]).stat().st_mode & 0o777) != "0o600"  # shareable, not private


def test_report_defaults_and_bad_input(runs: tuple[Path, str, str], capsys: pytest.CaptureFixture[str]) -> None:
    out, _, traced = runs
    assert main(["report", "--out", str(out), "--quiet"]) == 0  # latest run, into its own folder
    latest = sorted((out / "runs").iterdir())[-1]
    assert (latest / "report.html").is_file()
    capsys.readouterr()
    assert main(["report", "no-such-run", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no such run" in err
    assert main(["report", traced, "--out", str(out), "--html", str(out)]) == 2
    assert "is a folder" in capsys.readouterr().err
    empty = out / "empty"
    assert main(["report", "--out", str(empty)]) == 2
    assert "no runs yet" in capsys.readouterr().err


# -- the real browser ------------------------------------------------------------------------
def _chromium_or_skip() -> None:
    if browser.find_chromium() is None:
        if os.environ.get("CI") == "true":
            pytest.fail("CI=true but no chromium: .ci/run installs the Debian package `chromium`")
        pytest.skip("no chromium on this machine (install the Debian package `chromium`; CI fails instead)")


def test_page_renders_in_headless_chromium(page: Path, tmp_path: Path) -> None:
    _chromium_or_skip()
    seen = browser.open_page(page, tmp_path / "profile")
    assert seen.title.startswith("benchsuite run ")
    assert seen.errors == []  # no console error, no uncaught exception, no failed load
    assert len(seen.images) == 5 and all(done and width > 0 for done, width in seen.images)
    assert seen.images_attr == "5/5"  # the page's own check, after the load event
    assert all(u.startswith(("file://", "data:")) for u in seen.requests)  # nothing fetched from outside
    assert "Provenance" in seen.text and "Performance profiles" in seen.text
    shot = tmp_path / "shot.png"
    shot.write_bytes(seen.screenshot)
    from matplotlib.image import imread

    pixels = imread(shot)
    assert pixels.shape[1] == 1280
    ink = (pixels[..., :3].min(axis=2) < 0.5).mean()  # share of dark pixels: text and curves were drawn
    assert ink > 0.01  # a blank or failed page is ~0; the report's top screen is several per cent


def test_browser_check_catches_a_broken_page(tmp_path: Path) -> None:
    """The checks above can fail: a page with an external image, a missing file and a script error."""
    _chromium_or_skip()
    bad = tmp_path / "bad.html"
    bad.write_text('<html><body><img src="https://example.invalid/x.png"><img src="missing.png">'
                   '<script>console.error("planted"); notDefined();</script></body></html>')
    seen = browser.open_page(bad, tmp_path / "profile", wait_images_attr=0.0)
    assert any("planted" in e for e in seen.errors)
    assert any("notDefined" in e for e in seen.errors)
    assert any(u.startswith("https://") for u in seen.requests)
    assert all(width == 0 for _, width in seen.images)
    assert np.asarray(seen.images).shape == (2, 2)


def test_compare_page_is_self_contained_with_its_forest_plot() -> None:
    import math

    from benchsuite.compare import CaseComparison, Change, Comparison
    from benchsuite.htmlreport import compare_page

    step = Change(math.log(0.52), se=0.0)  # se 0: the interval is the point itself
    cases = (CaseComparison("quad-a", "reached", "reached", 1e-6, 40, 20, (1.0, 1.1), (0.5, 0.6), step, step, ""),
             CaseComparison("quad-b", "reached", "budget", None, 40, None, (), (), None, None, "B met no target"))
    text = compare_page(Comparison("gd", "nesterov", cases, step, None, 5))
    assert text.count("<img ") == 1 and "geometric mean" in text and "B met no target" in text
    assert "0.520 (0.520-0.520)" in text  # the ratio and its interval, three decimals
    refs = re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', text)
    assert all(r.startswith(("data:image/png;base64,", "#")) for r in refs)


def test_sweep_profiles_use_the_selected_point_under_the_base_label() -> None:
    import pandas as pd

    from benchsuite.htmlreport import profile_rows

    frame = pd.DataFrame({"case": ["a|gd(lr=0.1)", "a|gd(lr=1)", "b|gd(lr=0.1)", "b|gd(lr=1)"],
                          "rule": ["gd(lr=0.1)", "gd(lr=1)", "gd(lr=0.1)", "gd(lr=1)"], "iterations": [5, 3, 9, 40]})
    selected = [{"group": "a | gd", "case": "a|gd(lr=1)"}, {"group": "b | gd", "case": "b|gd(lr=0.1)"}]
    rows = profile_rows(frame, selected)
    assert rows["case"].tolist() == ["a|gd(lr=1)", "b|gd(lr=0.1)"] and set(rows["rule"]) == {"gd"}
    assert profile_rows(frame, []) is frame


def test_profiles_leave_out_targets_few_problems_have() -> None:
    import numpy as np

    from benchsuite.htmlreport import shared_targets
    from benchsuite.profiles import CostMatrix

    def m(target: float, n: int) -> CostMatrix:
        return CostMatrix("iterations", target, tuple(f"p{i}" for i in range(n)), ("gd",), np.ones((n, 1)), (1,) * n)

    # 18 problems have 1e-2, one has 1e-1, 9 have 1e-8 (exactly half: kept)
    assert shared_targets([m(1e-1, 1), m(1e-2, 18), m(1e-8, 9)]) == [1e-2, 1e-8]
    assert shared_targets([m(1e-2, 1)]) == []  # a profile over one problem says nothing
    assert shared_targets([]) == []
