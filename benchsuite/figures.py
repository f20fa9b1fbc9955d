"""Every figure benchsuite draws (matplotlib, Agg backend, imported only by the commands that draw).

Each function takes plain values (traces, cost matrices, a comparison) and
returns a :class:`matplotlib.figure.Figure`; :func:`png` turns one into PNG
bytes and frees it. No pyplot: figures are built directly on the Agg canvas,
so nothing global (an interactive backend, a figure registry) is touched.

Readable without colour: rules get the Okabe-Ito colour-blind-safe palette
*and* a line style and a marker, assigned in one place (:func:`rule_styles`)
so a rule looks the same in every figure. Dashed lines are reserved for
theory bounds (long dashes in dark grey: the lower bound of any
gradient-span method), dotted grey lines for targets.
"""

from __future__ import annotations

import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from benchsuite.curves import bound_points, first_divergence, seed_band, trace_xy
from benchsuite.profiles import CostMatrix, data_profile, performance_profile, performance_ratios, profile_breaks

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from benchsuite.compare import Comparison

__all__ = [
    "PALETTE",
    "RuleCurves",
    "Style",
    "compare_figure",
    "convergence_figure",
    "data_profile_figure",
    "gate_figure",
    "performance_profile_figure",
    "png",
    "rule_styles",
]

#: Okabe & Ito, "Color Universal Design" (2008): distinguishable with every common colour-vision deficiency
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#000000", "#F0E442")
#: rule line styles; "--" is left out on purpose (theory bounds)
LINESTYLES = ("-", "-.", ":", (0, (5, 1, 1, 1, 1, 1)))
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*", "<", ">", "h")
BOUND_STYLE = "--"
#: the lower bound on iterations (no rule of the gradient-span kind can be left of it)
LOWER_STYLE = (0, (8, 3))
#: convergence axes stop this far below the tightest target (six decades: room to see a curve go
#: past it, without 1e-30 round-off tails squeezing the targets into a corner)
FLOOR_BELOW_TIGHTEST = 1e-6
DPI = 90


@dataclass(frozen=True)
class Style:
    color: str
    linestyle: Any
    marker: str

    def kw(self) -> dict[str, Any]:
        return {"color": self.color, "linestyle": self.linestyle, "marker": self.marker}


def rule_styles(rules: Sequence[str]) -> dict[str, Style]:
    """A distinct (colour, line style, marker) per rule, stable for a given list of rules.

    The line style shifts by one each time the 8 colours come round again, so
    (colour, line style) pairs stay distinct for 32 rules even without the
    markers; neighbours differ in all three.
    """
    n = len(PALETTE)
    return {r: Style(PALETTE[i % n], LINESTYLES[(i + i // n) % len(LINESTYLES)], MARKERS[i % len(MARKERS)])
            for i, r in enumerate(sorted(dict.fromkeys(rules)))}


def _figure(width: float, height: float) -> Figure:
    import matplotlib

    matplotlib.use("Agg", force=False)  # harmless when already Agg; never an interactive backend
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=DPI)  # fixed margins: constrained layout costs 60 % of a report
    FigureCanvasAgg(fig)
    return fig


def png(fig: Figure, dpi: int = DPI) -> bytes:
    """The figure as a 256-colour PNG (a quarter of the RGBA file's size, no visible difference at
    these few flat colours; metadata stripped so the same figure gives the same bytes)."""
    from PIL import Image  # pillow: a dependency of matplotlib

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    fig.clear()
    buf.seek(0)
    with Image.open(buf) as im:
        small = im.convert("RGB").quantize(colors=256, method=Image.Quantize.FASTOCTREE)
    out = io.BytesIO()
    small.save(out, format="PNG", optimize=True)
    return out.getvalue()


def _marks(x: np.ndarray, n: int = 8) -> list[int]:
    """Indices of about ``n`` points evenly spread on a log x axis (markers, not one per noisy point)."""
    pos = np.asarray(x, dtype=float)
    pos = pos[pos > 0]
    if pos.size <= n:
        return list(range(pos.size))
    want = np.geomspace(pos[0], pos[-1], n)
    return sorted({int(i) for i in np.clip(np.searchsorted(pos, want), 0, pos.size - 1)})


def _targets(ax: Any, targets: Sequence[float]) -> None:
    for t in targets:
        ax.axhline(t, color="0.55", linestyle=":", linewidth=0.8, zorder=0)
    ax.set_yscale("log")


def _margins(fig: Figure, *, legend: bool, rows: int = 1) -> None:
    """Fixed margins in inches (axis labels left and below, the legend column right)."""
    w, h = fig.get_size_inches()
    fig.subplots_adjust(left=0.75 / w, right=1 - (2.45 if legend else 0.25) / w, bottom=0.6 / h, top=1 - 0.55 / h,
                        wspace=0.28, hspace=0.5)


def _legend(fig: Figure, handles: list[Any], labels: list[str]) -> None:
    if handles:
        w, h = fig.get_size_inches()
        fig.legend(handles, labels, loc="upper left", bbox_to_anchor=(1 - 2.35 / w, 1 - 0.5 / h), fontsize=8,
                   frameon=False)


# -- convergence curves --------------------------------------------------------------------
@dataclass(frozen=True)
class RuleCurves:
    """What one rule contributes to a problem's convergence figure."""

    rule: str
    traces: tuple[Any, ...]  # one Trace per seed
    theory_bound: tuple[int | None, ...] = ()
    bound_source: str = ""
    #: per target, the fewest iterations any gradient-span method can need (the instance's, same for every rule)
    theory_lower: tuple[int | None, ...] = ()


def convergence_figure(
    curves: Sequence[RuleCurves],
    targets: Sequence[float],
    *,
    title: str,
    measure: str = "measure",
    styles: Mapping[str, Style] | None = None,
) -> Figure:
    """Measure against iterations (left) and seconds (right), one line per rule, log-log.

    One seed: its trace. Several: the median over seeds, shaded from min to
    max (:func:`benchsuite.curves.seed_band`). Targets are dotted guides; a
    rule's theory bound is a dashed line through (bound iterations, target)
    points. The right panel uses the replay's wall-clock positions; a rule
    without them is left out there, and with no replay times at all (a run
    with ``--no-timing``) there is only the left panel.
    """
    styles = styles or rule_styles([c.rule for c in curves])
    timed = any(seed_band(c.traces, "seconds") is not None for c in curves)
    fig = _figure(11.5 if timed else 7.5, 3.9)
    if timed:
        ax_it, ax_s = fig.subplots(1, 2)
        panels = ((ax_it, "iteration"), (ax_s, "seconds"))
    else:
        ax_it = fig.subplots()
        panels = ((ax_it, "iteration"),)
    handles, labels = [], []
    for c in curves:
        st = styles[c.rule]
        line = None
        for ax, axis in panels:
            band = seed_band(c.traces, axis)
            if band is None:
                continue
            keep = band.x > 0  # log axis: iteration 0 / time 0 is the start point
            x, med = band.x[keep], band.median[keep]
            drawn = ax.plot(x, med, label=c.rule, linewidth=1.4, markevery=_marks(x), markersize=4, **st.kw())[0]
            if band.seeds > 1:
                ax.fill_between(x, band.lo[keep], band.hi[keep], color=st.color, alpha=0.18, linewidth=0)
            line = line or drawn
        if line is not None:
            handles.append(line)
            labels.append(c.rule)
        pts = bound_points(c.theory_bound, targets)
        if pts:
            ks, ts = zip(*pts)
            b = ax_it.plot(ks, ts, linestyle=BOUND_STYLE, color=st.color, marker="x", linewidth=1.0, markersize=5)[0]
            handles.append(b)
            labels.append(f"{c.rule}: theory bound")
    lower = next((c.theory_lower for c in curves if bound_points(c.theory_lower, targets)), ())
    if lower:
        ks, ts = zip(*bound_points(lower, targets))
        lo = ax_it.plot(ks, ts, linestyle=LOWER_STYLE, color="0.25", marker="+", linewidth=1.0, markersize=7)[0]
        handles.append(lo)
        labels.append("lower bound (Krylov)")
    xlabels = {"iteration": "iterations (log)", "seconds": "seconds, timing replay (log)"}
    floor = min(targets) * FLOOR_BELOW_TIGHTEST if targets else None
    for ax, axis in panels:
        _targets(ax, targets)
        if floor is not None and ax.get_ylim()[0] < floor:
            ax.set_ylim(bottom=floor)  # a curve going lower leaves through the bottom edge
        ax.set_xscale("log")
        ax.set_xlabel(xlabels[axis] if timed else "iterations (log); no replay times recorded")
        ax.set_ylabel(measure)
        ax.grid(True, which="major", alpha=0.25)
    fig.suptitle(title, fontsize=10)
    _margins(fig, legend=True)
    _legend(fig, handles, labels)
    return fig


# -- profiles --------------------------------------------------------------------------------
def _profile_axes(n: int) -> tuple[Figure, list[Any]]:
    """Panels two to a row (one per target)."""
    cols = min(max(n, 1), 2)
    rows = math.ceil(max(n, 1) / cols)
    fig = _figure(4.6 * cols + 1.8, 3.1 * rows + 0.5)
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax in axes[n:]:
        ax.set_visible(False)
    return fig, list(axes[:max(n, 1)])


def _stairs(ax: Any, xs: np.ndarray, ys: np.ndarray, st: Style, label: str) -> Any:
    return ax.step(xs, ys, where="post", label=label, linewidth=1.4, markevery=max(1, len(xs) // 8),
                   markersize=4, **st.kw())[0]


def performance_profile_figure(matrices: Sequence[CostMatrix], *, styles: Mapping[str, Style] | None = None,
                               title: str = "") -> Figure:
    """One panel per target: rho_s(tau), the fraction of problems on which a rule is within tau of the best."""
    rules = sorted({r for m in matrices for r in m.rules})
    styles = styles or rule_styles(rules)
    fig, axes = _profile_axes(len(matrices))
    handles: dict[str, Any] = {}
    for ax, m in zip(axes, matrices):
        r = performance_ratios(m.costs)
        top = float(profile_breaks(r).max()) if profile_breaks(r).size else 1.0
        taus = np.unique(np.concatenate([[1.0], profile_breaks(r), [max(2.0, top * 1.5)]]))
        rho = performance_profile(m.costs, taus)
        for j, rule in enumerate(m.rules):
            handles[rule] = _stairs(ax, taus, rho[j], styles[rule], rule)
        ax.set_xscale("log", base=2)
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel(f"tau (ratio to the best, {m.unit})")
        ax.set_title(f"target {m.target:g}  ({len(m.problems)} problem{'s' if len(m.problems) != 1 else ''})", fontsize=9)
        ax.grid(True, alpha=0.25)
    for ax in axes[::2]:
        ax.set_ylabel("fraction of problems")
    fig.suptitle(title or "Performance profiles (Dolan & Moré 2002); a failure counts as infinity", fontsize=10)
    _margins(fig, legend=True, rows=math.ceil(len(matrices) / 2))
    _legend(fig, list(handles.values()), list(handles))
    return fig


def data_profile_figure(matrices: Sequence[CostMatrix], *, styles: Mapping[str, Style] | None = None,
                        title: str = "") -> Figure:
    """One panel per target: d_s(alpha), the fraction solved within alpha (d + 1) gradient evaluations."""
    rules = sorted({r for m in matrices for r in m.rules})
    styles = styles or rule_styles(rules)
    fig, axes = _profile_axes(len(matrices))
    handles: dict[str, Any] = {}
    for ax, m in zip(axes, matrices):
        dims = np.array([d if d > 0 else 1 for d in m.dims], dtype=float)
        scaled = m.costs / (dims[:, None] + 1.0) if m.costs.size else m.costs
        br = profile_breaks(scaled)
        lo = float(br.min()) / 1.5 if br.size else 0.5
        hi = float(br.max()) * 1.5 if br.size else 2.0
        alphas = np.unique(np.concatenate([[lo], br, [hi]]))
        d = data_profile(m.costs, dims, alphas)
        for j, rule in enumerate(m.rules):
            handles[rule] = _stairs(ax, alphas, d[j], styles[rule], rule)
        ax.set_xscale("log")
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel("alpha: gradient evaluations / (d + 1)")
        ax.set_title(f"target {m.target:g}  ({len(m.problems)} problem{'s' if len(m.problems) != 1 else ''})", fontsize=9)
        ax.grid(True, alpha=0.25)
    for ax in axes[::2]:
        ax.set_ylabel("fraction of problems solved")
    fig.suptitle(title or "Data profiles (Moré & Wild 2009): alpha = gradient evaluations / (d + 1), d the dimension",
                 fontsize=10)
    _margins(fig, legend=True, rows=math.ceil(len(matrices) / 2))
    _legend(fig, list(handles.values()), list(handles))
    return fig


# -- gate: baseline against candidate ---------------------------------------------------------
def gate_figure(baseline: Any, candidate: Any, targets: Sequence[float], *, title: str,
                labels: tuple[str, str] = ("baseline", "candidate"), rtol: float = 1e-9,
                measure: str = "measure", divergence: int | None | str = "compute") -> Figure:
    """Two traces of one case overlaid, the first iteration where they part marked.

    ``divergence``: the iteration to mark as the gate judged it (e.g. from its
    round-off envelope; None: no divergence), or ``"compute"`` for
    :func:`benchsuite.curves.first_divergence` at relative tolerance ``rtol``.
    A baseline file's checkpoints become a trace with
    :func:`benchsuite.curves.trace_from_checkpoints`.
    """
    fig = _figure(7.5, 3.8)
    ax = fig.subplots()
    styles = (Style(PALETTE[0], "-", "o"), Style(PALETTE[5], "-.", "s"))
    for tr, st, lab in ((baseline, styles[0], labels[0]), (candidate, styles[1], labels[1])):
        x, y = trace_xy(tr, "iteration")
        keep = x > 0
        ax.plot(x[keep], y[keep], label=lab, linewidth=1.4, markevery=_marks(x[keep]), markersize=4, **st.kw())
    _targets(ax, targets)
    ax.set_xscale("log")
    k = first_divergence(baseline, candidate, rtol) if divergence == "compute" else divergence
    if k is not None and k > 0:
        ax.axvline(k, color="0.2", linestyle=BOUND_STYLE, linewidth=1.0)
        ax.annotate(f"first divergence: iteration {k}", xy=(k, 0.03), xycoords=("data", "axes fraction"),
                    ha="left", va="bottom", fontsize=8, xytext=(4, 0), textcoords="offset points",
                    bbox={"boxstyle": "round,pad=0.2", "facecolor": "white", "edgecolor": "none", "alpha": 0.8})
    else:
        ax.text(0.02, 0.04, "no divergence at the recorded iterations" if k is None else "differ from the start",
                transform=ax.transAxes, fontsize=8)
    ax.set_xlabel("iterations (log)")
    ax.set_ylabel(measure)
    ax.grid(True, alpha=0.25)
    ax.legend(fontsize=8, frameon=False)
    ax.set_title(title, fontsize=10)
    _margins(fig, legend=False)
    return fig


# -- compare: forest plot ---------------------------------------------------------------------
#: compare's two figures: Comparison / CaseComparison attribute -> panel title
COMPARE_PANELS = (("per_step", "time per step"), ("to_target", "time to target"))


def _forest(ax: Any, items: Sequence[tuple[str, Any]], pooled: Any, what: str) -> None:
    """One forest panel: a row per (label, Change) with its interval, the pooled change as a diamond."""
    n = len(items)
    ys = np.arange(n, 0, -1, dtype=float)
    colours = {"higher": PALETTE[5], "lower": PALETTE[2]}  # slower: vermillion, faster: bluish green
    for y, (_label, ch) in zip(ys, items):
        iv = ch.interval
        lo, hi = iv if iv is not None else (ch.ratio, ch.ratio)
        ax.errorbar([ch.ratio], [y], xerr=[[ch.ratio - lo], [hi - ch.ratio]], fmt="s" if iv is not None else "o",
                    color=colours.get(ch.direction, "0.35"), capsize=3, markersize=5,
                    markerfacecolor="white" if iv is None else None)
    if pooled is not None:
        iv = pooled.interval
        lo, hi = iv if iv is not None else (pooled.ratio, pooled.ratio)
        r = pooled.ratio
        ax.fill([lo, r, hi, r], [-0.5, -0.25, -0.5, -0.75], color=PALETTE[0])
        if iv is None:
            ax.plot([r], [-0.5], marker="D", color=PALETTE[0])
    ax.axvline(1.0, color="0.2", linewidth=0.9)
    ax.set_yticks(list(ys) + [-0.5], [label for label, _ in items] + ["geometric mean"], fontsize=8)
    ax.set_xscale("log")
    ax.set_ylim(-1.2, n + 0.8)
    ax.grid(True, axis="x", alpha=0.25)
    ax.set_xlabel(f"{what}: B / A (log; < 1: B faster)")


def compare_figure(comparison: Comparison, *, title: str = "") -> Figure:
    """Per case the time ratio B / A with its 95 % interval and the pooled geometric mean (a diamond):
    one panel for time per step, one for time to target (the two are pooled separately).

    A hollow marker has no interval (saved runs); colour says which way the
    interval lies: vermillion above 1 (B slower), green below (B faster), grey
    across 1 or unknown.
    """
    panels = []
    for attr, what in COMPARE_PANELS:
        items = [(c.instance, getattr(c, attr)) for c in comparison.cases if getattr(c, attr, None) is not None]
        pooled = getattr(comparison, attr, None)
        if items or pooled is not None:
            panels.append((items, pooled, what))
    from matplotlib.ticker import FuncFormatter

    heights = [len(p[0]) + 2.5 for p in panels] or [1.0]
    fig = _figure(8.0, 1.0 + 0.3 * sum(heights) + 0.7 * len(heights))
    axes = fig.subplots(len(heights), 1, squeeze=False, gridspec_kw={"height_ratios": heights})[:, 0]
    plain = FuncFormatter(lambda v, _pos: f"{v:g}")
    for ax, (items, pooled, what) in zip(axes, panels):
        _forest(ax, items, pooled, what)
        ax.xaxis.set_major_formatter(plain)
        ax.xaxis.set_minor_formatter(plain)
        ax.tick_params(axis="x", which="minor", labelsize=7)
    if not panels:
        axes[0].text(0.5, 0.5, "no case could be timed on both sides", ha="center", va="center",
                     transform=axes[0].transAxes)
        axes[0].set_axis_off()
    fig.suptitle(title or f"A = {comparison.label_a}, B = {comparison.label_b}: ratio per case with 95 % interval; "
                          "diamond: geometric mean", fontsize=9)
    w, h = fig.get_size_inches()
    width = max([len(c.instance) for c in comparison.cases] + [14])
    fig.subplots_adjust(left=min(0.45, (0.3 + 0.075 * width) / w), right=1 - 0.25 / w, bottom=0.6 / h,
                        top=1 - 0.45 / h, hspace=0.9 / (h / len(heights)))
    return fig


def nice(v: float) -> str:
    """A short number for captions."""
    if v is None or not math.isfinite(v):
        return "-"
    return f"{v:.3g}"
