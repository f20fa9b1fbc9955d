"""Curves and figures: the numbers drawn come from the stored traces; pixels are checked only for PNG validity."""

from __future__ import annotations

import io
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite import figures
from benchsuite.compare import CaseComparison, Comparison
from benchsuite.curves import bound_points, first_divergence, seed_band, trace_xy
from benchsuite.profiles import CostMatrix
from benchsuite.runs import Trace

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def tr(iters: list[int], measure: list[float], seconds: list[float] | None = None) -> Trace:
    it = np.array(iters, dtype=np.int64)
    return Trace(iteration=it, measure=np.array(measure, dtype=float), dist=np.full(len(iters), np.nan),
                 grad_calls=it.copy(),
                 seconds=np.array(seconds if seconds is not None else [np.nan] * len(iters), dtype=float))


def test_seed_band_by_hand() -> None:
    a = tr([0, 1, 2, 4], [1.0, 0.5, 0.25, 0.0625])
    b = tr([0, 1, 3], [1.0, 0.8, 0.1])  # stopped at 3: keeps 0.1 afterwards
    c = tr([0, 2, 4], [1.0, 0.9, 0.3])
    band = seed_band([a, b, c])
    assert np.array_equal(band.x, [0, 1, 2, 3, 4]) and band.seeds == 3
    # per x, the held values of (a, b, c):
    # x=0 (1, 1, 1); x=1 (.5, .8, 1); x=2 (.25, .8, .9); x=3 (.25, .1, .9); x=4 (.0625, .1, .3)
    assert np.allclose(band.median, [1, 0.8, 0.8, 0.25, 0.1])
    assert np.allclose(band.lo, [1, 0.5, 0.25, 0.1, 0.0625])
    assert np.allclose(band.hi, [1, 1, 0.9, 0.9, 0.3])


@settings(max_examples=50, deadline=None)
@given(st.lists(st.lists(st.floats(1e-12, 1.0), min_size=1, max_size=12), min_size=1, max_size=5))
def test_seed_band_laws(measures: list[list[float]]) -> None:
    """min <= median <= max everywhere; one seed gives back its own trace; x covers every seed's points."""
    traces = [tr(list(range(len(m))), m) for m in measures]
    band = seed_band(traces)
    assert np.all(band.lo <= band.median) and np.all(band.median <= band.hi)
    assert np.array_equal(band.x, np.arange(max(len(m) for m in measures)))
    one = seed_band(traces[:1])
    assert np.array_equal(one.median, measures[0]) and np.array_equal(one.lo, one.hi)


def test_seed_band_on_seconds_skips_points_without_time() -> None:
    a = tr([0, 1, 2], [1.0, 0.5, 0.1], [0.0, np.nan, 2e-3])
    b = tr([0, 1], [1.0, 0.2])  # never replayed
    band = seed_band([a, b], "seconds")
    assert band.seeds == 1 and np.array_equal(band.x, [0.0, 2e-3]) and np.array_equal(band.median, [1.0, 0.1])
    assert seed_band([b], "seconds") is None
    with pytest.raises(ValueError, match="axis"):
        trace_xy(a, "flops")


def test_bound_points_and_first_divergence() -> None:
    assert bound_points([10, None, 40], [1e-2, 1e-4, 1e-6]) == [(10, 1e-2), (40, 1e-6)]
    base = tr([0, 1, 2, 3, 4], [1.0, 0.5, 0.25, 0.125, 0.0625])
    same = tr([0, 1, 2, 3, 4], [1.0, 0.5, 0.25, 0.125, 0.0625])
    assert first_divergence(base, same) is None
    cand = tr([0, 1, 2, 3, 4], [1.0, 0.5, 0.25 * (1 + 1e-12), 0.2, 0.1])  # 1e-12 is within rtol 1e-9
    assert first_divergence(base, cand) == 3
    assert first_divergence(base, cand, rtol=1e-13) == 2
    shorter = tr([0, 1, 2], [1.0, 0.5, 0.25])  # agrees, but stopped earlier
    assert first_divergence(base, shorter) == 3
    with_nan = tr([0, 1, 2, 3, 4], [1.0, 0.5, np.nan, 0.125, 0.0625])
    assert first_divergence(base, with_nan) == 2


def test_rule_styles_are_distinct_and_stable() -> None:
    rules = [f"r{i}" for i in range(11)]
    st = figures.rule_styles(rules)
    triples = {(s.color, str(s.linestyle), s.marker) for s in st.values()}
    assert len(triples) == 11
    many = figures.rule_styles([f"r{i:02d}" for i in range(32)]).values()
    assert len({(s.color, str(s.linestyle)) for s in many}) == 32  # distinct without looking at markers
    assert figures.rule_styles(list(reversed(rules))) == st
    assert all(s.linestyle != "--" for s in st.values())  # dashes mean theory bound


def test_convergence_figure_draws_the_stored_traces() -> None:
    a = tr([0, 1, 2, 4], [1.0, 0.5, 0.25, 0.0625], [0.0, 1e-3, 2e-3, 4e-3])
    seeds = [tr([0, 1, 2], [1.0, 0.4, 0.2]), tr([0, 1, 2], [1.0, 0.6, 0.3]), tr([0, 1, 2], [1.0, 0.5, 0.1])]
    fig = figures.convergence_figure(
        [figures.RuleCurves("gd", (a,), (3, None), "(1 - 1/kappa)^k"), figures.RuleCurves("sgd", tuple(seeds))],
        [0.3, 0.1], title="quad")
    ax_it, ax_s = fig.axes[:2]
    gd, bound, sgd = [ln for ln in ax_it.get_lines() if ln.get_label() in ("gd", "_child1", "sgd")
                      or ln.get_linestyle() == "--"][:3]
    assert np.array_equal(gd.get_xdata(), [1, 2, 4]) and np.array_equal(gd.get_ydata(), [0.5, 0.25, 0.0625])
    assert bound.get_linestyle() == "--" and list(bound.get_xdata()) == [3] and list(bound.get_ydata()) == [0.3]
    assert np.allclose(sgd.get_ydata(), [0.5, 0.2])  # medians of (0.4, 0.6, 0.5) and (0.2, 0.3, 0.1)
    assert len(ax_it.collections) == 1  # one band: the three-seed rule
    guides = [ln for ln in ax_it.get_lines() if ln.get_linestyle() == ":" and ln.get_color() == "0.55"]
    assert sorted(g.get_ydata()[0] for g in guides) == [0.1, 0.3]
    time_lines = [ln for ln in ax_s.get_lines() if ln.get_label() == "gd"]
    assert np.array_equal(time_lines[0].get_xdata(), [1e-3, 2e-3, 4e-3])  # only gd has replay times
    data = figures.png(fig)
    assert data.startswith(PNG_MAGIC)
    from PIL import Image

    with Image.open(io.BytesIO(data)) as im:  # the figure's size in inches times its dpi
        assert im.size == (round(11.5 * figures.DPI), round(3.9 * figures.DPI))
        assert len(im.getcolors(256) or ()) > 5  # drawn in several colours, not blank


def test_profile_figures_step_at_the_hand_computed_values() -> None:
    inf = math.inf
    m = CostMatrix("iterations", 1e-4, ("p0", "p1", "p2", "p3"), ("a", "b"),
                   np.array([[1, 2], [4, 2], [3, inf], [inf, inf]], dtype=float), (1, 3, 1, 2))
    fig = figures.performance_profile_figure([m])
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    # ratios: a (1, 2, 1, inf), b (2, 1, inf, inf): rho_a = 2/4 at tau 1, 3/4 from 2; rho_b 1/4, 2/4
    xa, ya = lines["a"].get_xdata(), lines["a"].get_ydata()
    assert list(xa[:2]) == [1.0, 2.0] and list(ya[:2]) == [0.5, 0.75]
    assert list(lines["b"].get_ydata()[:2]) == [0.25, 0.5]
    fig = figures.data_profile_figure([m])
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    # scaled by d + 1 = (2, 4, 2, 3): a (0.5, 1, 1.5, inf), b (1, 0.5, inf, inf)
    xs, ys = lines["a"].get_xdata(), lines["a"].get_ydata()
    assert [ys[list(xs).index(v)] for v in (0.5, 1.0, 1.5)] == [0.25, 0.5, 0.75]
    assert "d + 1" in fig.get_suptitle()
    assert figures.png(fig).startswith(PNG_MAGIC)


def test_gate_figure_marks_first_divergence() -> None:
    base = tr([0, 1, 2, 3, 4], [1.0, 0.5, 0.25, 0.125, 0.0625])
    cand = tr([0, 1, 2, 3, 4], [1.0, 0.5, 0.25, 0.2, 0.1])
    fig = figures.gate_figure(base, cand, [0.1], title="quad | gd")
    marks = [ln for ln in fig.axes[0].get_lines() if ln.get_linestyle() == "--"]
    assert len(marks) == 1 and list(marks[0].get_xdata()) == [3, 3]
    assert any("iteration 3" in t.get_text() for t in fig.axes[0].texts)
    assert figures.png(fig).startswith(PNG_MAGIC)
    # a baseline file keeps the measure at its checkpoints; the gate may pass its own judgement
    from benchsuite.curves import trace_from_checkpoints

    stored = trace_from_checkpoints([1, 2, 4], [0.5, 0.25, 0.0625])
    assert first_divergence(stored, base) is None  # equal at the common iterations 1, 2, 4 and same end
    fig = figures.gate_figure(stored, cand, [0.1], title="q", divergence=None)
    assert not [ln for ln in fig.axes[0].get_lines() if ln.get_linestyle() == "--"]
    assert any("no divergence" in t.get_text() for t in fig.axes[0].texts)
    with pytest.raises(ValueError, match="checkpoints"):
        trace_from_checkpoints([1, 2], [0.5])


def test_compare_figure_forest() -> None:
    from benchsuite.compare import Change

    def case(name: str, step: Change | None, target: Change | None) -> CaseComparison:
        return CaseComparison(name, "reached", "reached", 1e-6, 10, 10, (1.0,), (1.0,), step, target, "")

    faster = Change(math.log(0.5), se=0.05, df=8)
    slower = Change(math.log(1.2), se=0.01, df=8)
    cmp_ = Comparison("gd", "nesterov", (case("a", faster, faster), case("b", slower, None), case("c", None, None)),
                      per_step=Change(math.log(0.8), se=0.1, df=10, cases=2), to_target=None, pairs=5)
    fig = figures.compare_figure(cmp_)
    step_ax, target_ax = fig.axes[:2]
    assert [t.get_text() for t in step_ax.get_yticklabels()] == ["a", "b", "geometric mean"]  # c: no figure
    assert [t.get_text() for t in target_ax.get_yticklabels()] == ["a", "geometric mean"]
    lo, hi = cmp_.per_step.interval
    diamond = step_ax.patches[0].get_xy()
    assert np.isclose(min(diamond[:, 0]), lo) and np.isclose(max(diamond[:, 0]), hi)
    assert not target_ax.patches  # nothing pooled to target: no diamond drawn
    assert figures.png(fig).startswith(PNG_MAGIC)


def test_convergence_figure_without_replay_times_has_one_panel() -> None:
    fig = figures.convergence_figure([figures.RuleCurves("gd", (tr([0, 1, 2], [1.0, 0.5, 0.2]),))], [0.3],
                                     title="untimed")
    assert len(fig.axes) == 1 and "no replay times" in fig.axes[0].get_xlabel()


def test_convergence_axis_stops_six_decades_below_the_tightest_target() -> None:
    deep = tr([0, 1, 2, 3], [1.0, 1e-3, 1e-20, 1e-30])
    fig = figures.convergence_figure([figures.RuleCurves("gd", (deep,))], [1e-2, 1e-8], title="deep")
    assert np.isclose(fig.axes[0].get_ylim()[0], 1e-14)
    line = [ln for ln in fig.axes[0].get_lines() if ln.get_label() == "gd"][0]
    assert np.array_equal(line.get_ydata(), [1e-3, 1e-20, 1e-30])  # the data is all there; the view is cut


def test_lower_bound_drawn_once_per_problem() -> None:
    a = tr([0, 1, 2, 4], [1.0, 0.5, 0.25, 0.0625])
    curves = [figures.RuleCurves(r, (a,), theory_lower=(2, 3)) for r in ("gd", "heavy_ball")]
    fig = figures.convergence_figure(curves, [0.3, 0.1], title="q")
    lows = [ln for ln in fig.axes[0].get_lines() if ln.get_linestyle() == "--" and ln.get_marker() == "+"]
    assert len(lows) == 1  # the instance's bound, not one per rule
    assert list(lows[0].get_xdata()) == [2, 3] and list(lows[0].get_ydata()) == [0.3, 0.1]
