"""The report of one run: a self-contained HTML page, or markdown with PNGs beside it.

:func:`build_report` reads a stored run (:class:`benchsuite.runs.StoredRun`)
and draws its figures into a :class:`Report` value; :func:`render_html` and
:func:`render_markdown` only format that value. The page is in this order:

1. summary -- what ran, when, how it ended, per-rule counts of outcomes;
2. profiles -- performance profiles in iterations and in time, data profiles;
3. per problem -- convergence curves (from the stored traces, never re-run)
   and the table of iterations to each target beside the theory bound;
4. provenance -- machine, versions, git commit and dirty flag, and for each
   problem its certified optimum and how it was obtained (the cached
   certificate of :mod:`benchsuite.optimum`).

Every picture is a PNG embedded as base64, styles are inline, the one small
script is inline: the page fetches nothing, so it can be attached to a CI job
or mailed. That script only marks ``<body data-images="loaded/total">`` once
every image has decoded (what the browser test reads).
"""

from __future__ import annotations

import base64
import html
import math
import re
import statistics
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

from benchsuite.runs import NO_TRACES, StoredRun

__all__ = [
    "Figure",
    "Heading",
    "ProblemSection",
    "Report",
    "Table",
    "build_report",
    "compare_page",
    "figure",
    "page",
    "render_html",
    "render_markdown",
]


@dataclass(frozen=True)
class Figure:
    name: str  # file-name stem (markdown) and anchor
    caption: str
    png: bytes


@dataclass(frozen=True)
class Table:
    headers: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


@dataclass(frozen=True)
class ProblemSection:
    name: str
    heading: str  # e.g. "subopt, full gradient, budget 3000"
    figure: Figure | None
    table: Table
    note: str = ""


@dataclass(frozen=True)
class Report:
    title: str
    summary: tuple[str, ...]  # sentences
    summary_table: Table
    profiles: tuple[Figure, ...]
    profile_notes: tuple[str, ...]
    problems: tuple[ProblemSection, ...]
    provenance: tuple[tuple[str, str], ...]
    optima: Table
    notes: tuple[str, ...] = field(default_factory=tuple)


# -- building --------------------------------------------------------------------------------
def _fmt(v: Any, digits: int = 3) -> str:
    if v is None:
        return "-"
    try:
        f = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(f):
        return "-"
    return f"{f:.{digits}g}"


def _seconds(s: Any) -> str:
    try:
        s = float(s)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(s):
        return "-"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6)):
        if s >= scale:
            return f"{s / scale:.3g} {unit}"
    return f"{s / 1e-9:.3g} ns"


def _is_num(v: Any) -> bool:
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _problem_of(row: Any) -> str:
    name = str(row["instance"])
    if str(row.get("oracle")) == "minibatch":
        name += f" (minibatch B={int(float(row['batch']))})"
    return name


def _rows_by_case(frame: Any) -> dict[str, Any]:
    return {str(k): g for k, g in frame.groupby("case", sort=False)}


def _targets_of(group: Any) -> list[float]:
    g = group.drop_duplicates("target_index").sort_values("target_index")
    return [float(t) for t in g["target"]]


def _iter_cell(group: Any, j: int, bound: Any, lower: Any = None) -> str:
    """Iterations to target j (median over seeds), the bounds beside it: ``(>= lower, <= bound)``;
    ``!`` marks a count outside them (above the guarantee, or below what any gradient-span method can do)."""
    sub = group[group["target_index"] == j]
    ks = [float(k) for k in sub["iterations"] if _is_num(k)]
    if not ks:
        text = "-"
    elif len(sub) == 1:
        text = str(int(ks[0]))
    else:
        text = f"{statistics.median(ks):g} ({len(ks)}/{len(sub)} seeds)"
    limits = []
    flag = ""
    if _is_num(lower):
        limits.append(f">= {int(float(lower))}")
        flag = " !" if ks and min(ks) < float(lower) else flag
    if _is_num(bound):
        limits.append(f"<= {int(float(bound))}")
        flag = " !" if ks and max(ks) > float(bound) else flag
    if limits:
        text += f" ({', '.join(limits)}){flag}"
    return text


def _case_table(cases: Sequence[tuple[str, Any, dict[str, Any]]], targets: Sequence[float]) -> Table:
    headers = ("rule", "status", *(f"{t:.0e}" for t in targets), "time/step", f"time to {targets[-1]:.0e}"
               if targets else "time", "final measure")
    rows = []
    for _key, group, doc in cases:
        bounds = list(doc.get("theory_bound") or ()) if doc else []
        lowers = list(doc.get("theory_lower") or ()) if doc else []
        first = group.iloc[0]
        cells = [str(first["rule"]), str(first.get("case_status", "?"))]
        for j in range(len(targets)):
            cells.append(_iter_cell(group, j, bounds[j] if j < len(bounds) else None,
                                    lowers[j] if j < len(lowers) else None))
        tps = [float(v) for v in group["time_per_step"] if _is_num(v)] if "time_per_step" in group else []
        cells.append(_seconds(statistics.median(tps)) if tps else "-")
        last = group[group["target_index"] == len(targets) - 1]
        ttt = [float(v) for v in last["time_to_target"] if _is_num(v)] if "time_to_target" in last else []
        cells.append(_seconds(statistics.median(ttt)) if ttt and len(ttt) == len(last) else "-")
        fm = [float(v) for v in group.drop_duplicates("seed")["final_measure"] if _is_num(v)]
        cells.append(_fmt(statistics.median(fm)) if fm else "-")
        rows.append(tuple(cells))
    return Table(headers, tuple(rows))


def _cases_with(rows: Any, flag: str) -> int:
    """How many cases have a row with ``flag`` true (0 when the table has no such column: older runs)."""
    if flag not in rows:
        return 0
    return int(rows.groupby("case")[flag].apply(lambda s: bool((s == True).any())).sum())  # noqa: E712


def _summary(run: StoredRun) -> tuple[tuple[str, ...], Table]:
    info, meta, frame = run.info, run.meta, run.frame
    per_case = frame.drop_duplicates("case")
    statuses = per_case["case_status"].astype(str).value_counts().to_dict() if len(per_case) else {}
    counts = ", ".join(f"{n} {s}" for s, n in sorted(statuses.items(), key=lambda kv: -kv[1]))
    req = meta.get("request") or {}
    sentences = [
        f"Run {info.run_id}: {info.status}, started {info.started}, ended {info.ended}.",
        f"{info.cases_done} of {info.cases_planned or '?'} cases stored: {len(info.rules)} rules on "
        f"{len(info.problems)} problems ({info.selector}"
        + (f", minibatch B={req.get('batch')}" if req.get("batch") else ", full gradient") + ").",
        f"Case outcomes: {counts or 'none'}.",
        "Status: reached = every target met; partial = some; budget = none within the iteration budget; "
        "unstable = every target met, but the measure rose above the tightest target again while the pass went "
        "on; diverged / error / timeout = the pass failed.",
    ]
    if info.failed:
        sentences.append(f"{info.failed} case(s) failed; their tracebacks: `benchsuite runs {info.run_id} --errors`.")
    rows = []
    tight = frame.groupby("case")["target_index"].transform("max") == frame["target_index"]
    for rule, g in per_case.groupby("rule"):
        st = g["case_status"].astype(str)
        gt = frame[tight & (frame["rule"] == rule)]
        solved = gt.groupby("case")["iterations"].apply(lambda s: all(_is_num(v) for v in s)).sum()
        viol = frame[(frame["rule"] == rule)]
        nviol = _cases_with(viol, "bound_violated")
        nbelow = _cases_with(viol, "below_lower")
        rows.append((str(rule), str(len(g)), str((st == "reached").sum()), str((st == "partial").sum()),
                     str((st == "budget").sum()), str((st == "unstable").sum()),
                     str(st.isin(["diverged", "error", "timeout"]).sum()), f"{solved}/{len(g)}", str(nviol),
                     str(nbelow)))
    table = Table(("rule", "cases", "reached", "partial", "budget", "unstable", "failed", "tightest target met",
                   "above bound", "below lower bound"),
                  tuple(rows))
    return tuple(sentences), table


def shared_targets(matrices: Sequence[Any]) -> list[float]:
    """Targets worth a profile: those at least half of the run's problems (and at least two) have."""
    if not matrices:
        return []
    most = max(len(m.problems) for m in matrices)
    return [m.target for m in matrices if len(m.problems) >= max(2, math.ceil(most / 2))]


def profile_rows(frame: Any, selected: Sequence[Any]) -> Any:
    """The rows a sweep's profiles use: per problem only the selected grid point of each rule, under the
    rule's base label (``selected``: meta.json's sweep selection), so a rule is one column of the profile."""
    chosen = {s["case"]: s["group"].split(" | ", 1)[1] for s in selected
              if isinstance(s, dict) and "case" in s and " | " in str(s.get("group"))}
    if not chosen:
        return frame
    out = frame[frame["case"].isin(chosen)].copy()
    out["rule"] = out["case"].map(chosen)
    return out


def _profiles(run: StoredRun, dims: dict[str, int], draw: Any) -> tuple[list[Figure], list[str]]:
    from benchsuite import figures
    from benchsuite.profiles import cost_matrices, timed

    frame = run.frame
    notes: list[str] = []
    out: list[Figure] = []
    if frame.empty or not frame["target"].map(_is_num).all():
        return out, ["No profiles: the run stored no results table with targets."]
    if run.meta.get("selected"):
        frame = profile_rows(frame, run.meta["selected"])
        notes.append("This run swept a hyperparameter: the profiles compare each rule at the value selected per "
                     "problem; the curves below show every grid point.")
    rules = sorted(frame["rule"].astype(str).unique())
    if len(rules) < 2:
        notes.append("Profiles compare rules; this run has one rule, so they show what it solved.")
    styles = figures.rule_styles(rules)
    every = {m: cost_matrices(frame, m, dims) for m in ("iterations", "time", "grad_calls")}
    kept = shared_targets(every["iterations"])
    left_out = [m.target for m in every["iterations"] if m.target not in kept]
    if left_out:
        notes.append("Targets that fewer than half of the problems have are left out of the profiles: "
                     + ", ".join(f"{t:g}" for t in left_out) + ".")
    it, tm, gc = ([m for m in every[k] if m.target in kept] for k in ("iterations", "time", "grad_calls"))
    out.append(draw("profile-iterations", figures.performance_profile_figure(it, styles=styles),
                    "Performance profiles in iterations (Dolan & Moré 2002). For each target: the fraction of "
                    "problems on which a rule needs at most tau times the iterations of the best rule; a "
                    "failure to meet the target counts as infinity. Cost: the first iteration at which the measure meets the "
                    "target (median over seeds; a seed that never meets it counts as infinity)."))
    if any(timed(m) for m in tm):
        out.append(draw("profile-time", figures.performance_profile_figure(
            tm, styles=styles, title="Performance profiles in wall time (timing replay); a failure counts as infinity"),
            "Performance profiles in time: the same, with the median replayed wall time to each target."))
    else:
        notes.append("No time profiles: this run was not timed (--no-timing).")
    out.append(draw("profile-data", figures.data_profile_figure(gc, styles=styles),
                    "Data profiles (Moré & Wild 2009): the fraction of problems a rule solves within a budget of "
                    "alpha simplex gradients, i.e. alpha (d + 1) gradient evaluations for a problem of dimension d "
                    "(the paper's normalisation). Solved: the measure reaches the target against the certified "
                    "optimum (the paper compares with the best value any solver found)."))
    return out, notes


def _problem_sections(run: StoredRun, draw: Any, traces_ok: bool) -> list[ProblemSection]:
    from benchsuite import figures

    frame = run.frame
    if frame.empty:
        return []
    styles = figures.rule_styles(sorted(frame["rule"].astype(str).unique()))
    by_case = _rows_by_case(frame)
    problems: dict[str, list[str]] = {}
    for key, g in by_case.items():
        problems.setdefault(_problem_of(g.iloc[0]), []).append(key)
    sections = []
    for pname in sorted(problems):
        keys = sorted(problems[pname], key=lambda k: str(by_case[k].iloc[0]["rule"]))
        first = by_case[keys[0]].iloc[0]
        targets = _targets_of(by_case[keys[0]])
        cases = [(k, by_case[k], run.cases.get(k, {})) for k in keys]
        heading = (f"{first.get('measure', '')}, {'minibatch' if first.get('oracle') == 'minibatch' else 'full gradient'}, "
                   f"budget {_fmt(first.get('budget'), 6)}")
        table = _case_table(cases, targets)
        fig, note = None, ""
        curves = []
        if traces_ok:
            for k, g, doc in cases:
                tr = run.traces(k)
                if tr:
                    curves.append(figures.RuleCurves(str(g.iloc[0]["rule"]), tuple(tr[s] for s in sorted(tr)),
                                                     tuple(doc.get("theory_bound") or ()), doc.get("bound_source", ""),
                                                     tuple(doc.get("theory_lower") or ())))
            missing = len(cases) - len(curves)
            if curves:
                seeds = max(len(c.traces) for c in curves)
                bounds = sorted({f"{c.rule}: {c.bound_source}" for c in curves if c.bound_source})
                caption = (f"{pname}: measure against iterations and against replayed seconds"
                           + (f", median over {seeds} seeds with min..max band (a seed that stopped keeps its final "
                              "measure)" if seeds > 1 else "")
                           + ". Dotted: targets. The axis stops six decades below the tightest target; a measure of 0 "
                           "or below (the optimum to the last bit) has no place on the log axis and is not drawn."
                           + (" Dashed: iterations the theory bound guarantees for each target ("
                              + "; ".join(bounds) + ")." if bounds else "")
                           + (" Long dashes, dark grey: the fewest iterations any gradient-span method can need "
                              "(the conjugate-gradient count on this quadratic); no curve of such a rule can cross a "
                              "target left of it." if any(c.theory_lower for c in curves) else ""))
                fig = draw(f"curves-{_slug(pname)}", figures.convergence_figure(
                    curves, targets, title=pname, measure=str(first.get("measure", "measure")), styles=styles),
                    caption)
            if missing:
                note = f"{missing} case(s) without a stored trace (failed before the first step, or not recorded)."
        else:
            note = NO_TRACES + "."
        sections.append(ProblemSection(pname, heading, fig, table, note))
    return sections


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-")


def _provenance(run: StoredRun) -> tuple[tuple[tuple[str, str], ...], Table]:
    meta = run.meta
    m = meta.get("machine") or {}
    git = meta.get("git") or {}
    settings = meta.get("settings") or {}
    blas = "; ".join(f"{b.get('internal_api')} {b.get('version')} ({b.get('num_threads')} threads)"
                     for b in m.get("blas") or ())
    items = [
        ("benchsuite", str(meta.get("version", m.get("benchsuite", "?")))),
        ("git commit", f"{git.get('commit') or 'not a git checkout'}"
                       + ("" if git.get("dirty") is None else (" (dirty: uncommitted changes)" if git.get("dirty")
                                                                else " (clean)"))),
        ("started / ended", f"{meta.get('started', '-')} / {meta.get('ended', '-')}"),
        ("machine", f"{m.get('cpu', '?')}, {m.get('cores', '?')} cores, {m.get('platform', '?')}"),
        ("Python / numpy / scipy", f"{m.get('implementation', '')} {m.get('python', '?')} / {m.get('numpy', '?')} / "
                                   f"{m.get('scipy', '?')}"),
        ("BLAS", blas or "-"),
        ("settings", ", ".join(f"{k}={v}" for k, v in sorted(settings.items())) or "-"),
        ("request", ", ".join(f"{k}={v}" for k, v in sorted((meta.get("request") or {}).items()) if v not in (None, [], ""))
         or "-"),
    ]
    if meta.get("resumed"):
        items.append(("resumed", ", ".join(meta["resumed"])))
    return tuple(items), _optima(run)


def _instances(run: StoredRun) -> tuple[dict[str, Any], str]:
    from benchsuite.catalogue import load_catalogue
    from benchsuite.errors import UserError

    req = run.meta.get("request") or {}
    try:
        return load_catalogue(list(req.get("catalogue") or ()) or None), ""
    except UserError as exc:
        return {}, f"catalogue not readable here ({exc})"


def _optima(run: StoredRun) -> Table:
    from benchsuite.optimum import cached_entry

    cat, why = _instances(run)
    rows = []
    for name in run.info.problems:
        inst = cat.get(name)
        doc = cached_entry(inst) if inst is not None else None
        if doc is None:
            rows.append((name, "-", why or ("not in the catalogue" if inst is None else "no cached certificate"),
                         "-", "-", "-"))
            continue
        methods = ", ".join(r["method"] for r in doc.get("routes", ()) if r.get("ok"))
        lre = doc.get("lre") or {}
        lre_vals = [float(v) for v in lre.values() if _is_num(v)]
        pub = doc.get("published") or {}
        rows.append((
            name,
            "certified" if doc.get("certified") else "NOT certified",
            str(doc.get("how") or doc.get("reason") or "-"),
            methods or "-",
            _fmt(doc.get("agreement_digits"), 3),
            (f"min LRE {min(lre_vals):.1f} vs {pub.get('source')}" if lre_vals else (pub.get("source") or "-")),
        ))
    return Table(("problem", "optimum", "how", "routes that agree", "agreement digits", "published check"),
                 tuple(rows))


def _dims(run: StoredRun) -> dict[str, int]:
    cat, _ = _instances(run)
    out = {}
    from benchsuite.optimum import cached_entry

    for name in run.info.problems:
        inst = cat.get(name)
        doc = cached_entry(inst) if inst is not None else None
        dim = (doc or {}).get("facts", {}).get("dim") if doc else None
        if dim is None and inst is not None:
            dim = inst.params.get("d") or inst.params.get("dim")
        if isinstance(dim, int) and dim > 0:
            out[name] = dim
    return out


def build_report(run: StoredRun, *, progress: Callable[[str], None] | None = None) -> Report:
    """Draw every figure of a run (matplotlib, Agg) and collect its tables."""
    from benchsuite import figures

    def draw(name: str, fig: Any, caption: str) -> Figure:
        if progress is not None:
            progress(name)
        return Figure(name, caption, figures.png(fig))

    traces_ok = run.has_traces()
    summary, summary_table = _summary(run)
    notes = [] if traces_ok else [NO_TRACES + "."]
    dims = _dims(run)
    profiles, pnotes = _profiles(run, dims, draw)
    missing_dims = sorted(set(run.info.problems) - set(dims))
    if missing_dims:
        pnotes.append(f"Dimension unknown for {', '.join(missing_dims)}: data profiles use d = 1 there.")
    sections = _problem_sections(run, draw, traces_ok)
    provenance, optima = _provenance(run)
    return Report(f"benchsuite run {run.run_id}", summary, summary_table, tuple(profiles), tuple(pnotes),
                  tuple(sections), provenance, optima, tuple(notes))


# -- HTML ------------------------------------------------------------------------------------
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:1.5em auto;max-width:1180px;
padding:0 1em;color:#1a1a1a;line-height:1.4}
h1{font-size:1.5em}h2{font-size:1.25em;border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:2em}
h3{font-size:1.05em;margin-bottom:.2em}
table{border-collapse:collapse;font-size:.85em;margin:.5em 0}
th,td{border:1px solid #ddd;padding:.2em .5em;text-align:left;vertical-align:top}
th{background:#f3f3f3}td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:.6em 0}figure img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85em;color:#444;max-width:60em}
.note{color:#8a4b00}.muted{color:#666;font-size:.85em}nav a{margin-right:1em}
"""

# marks <body data-images="loaded/total"> once every image decoded (read by the browser test)
_SCRIPT = """
(function(){
  function mark(){
    var imgs=Array.prototype.slice.call(document.images);
    var ok=imgs.filter(function(i){return i.complete&&i.naturalWidth>0;}).length;
    document.body.setAttribute('data-images', ok+'/'+imgs.length);
  }
  window.addEventListener('load', mark);
})();
"""


def _h(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _html_table(t: Table) -> str:
    head = "".join(f"<th>{_h(c)}</th>" for c in t.headers)
    body = []
    for row in t.rows:
        cells = "".join(
            f"<td class=\"num\">{_h(c)}</td>" if _numeric_cell(str(c))
            else f"<td>{_h(c)}</td>" for c in row)
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _numeric_cell(c: str) -> bool:
    """Right-align counts, times and '-' (no value) so columns of numbers line up."""
    return c == "-" or bool(re.match(r"^[\d.]+(/\d+)?(e[-+]?\d+)?( ?(s|ms|us|ns))?( \(.*\))?( !)?$", c))


def _html_figure(f: Figure) -> str:
    data = base64.b64encode(f.png).decode("ascii")
    return (f"<figure id=\"{_h(f.name)}\"><img alt=\"{_h(f.caption)}\" src=\"data:image/png;base64,{data}\">"
            f"<figcaption>{_h(f.caption)}</figcaption></figure>")


def render_html(r: Report) -> str:
    """One self-contained page (inline CSS, inline PNGs, one inline script)."""
    parts = [
        "<nav><a href=\"#summary\">Summary</a><a href=\"#profiles\">Profiles</a>"
        "<a href=\"#problems\">Problems</a><a href=\"#provenance\">Provenance</a></nav>",
        "<h2 id=\"summary\">Summary</h2>",
        *(f"<p>{_h(s)}</p>" for s in r.summary),
        *(f"<p class=\"note\">{_h(n)}</p>" for n in r.notes),
        _html_table(r.summary_table),
        "<p class=\"muted\">tightest target met: every seed met the case's tightest target. "
        "above bound: a seed needed more iterations than the published bound allows. below lower bound: a seed "
        "needed fewer iterations than any gradient-span method can (a measurement error).</p>",
        "<h2 id=\"profiles\">Profiles</h2>",
        *(f"<p class=\"note\">{_h(n)}</p>" for n in r.profile_notes),
        *(_html_figure(f) for f in r.profiles),
        "<h2 id=\"problems\">Problems</h2>",
        "<p class=\"muted\">Iterations to each target (median over seeds where there are several); "
        "(&lt;= N): the theory bound; (&gt;= N): the lower bound of any gradient-span method; ! marks a count "
        "outside them.</p>",
    ]
    parts.append("<p>" + " ".join(f"<a href=\"#p-{_h(_slug(p.name))}\">{_h(p.name)}</a>" for p in r.problems) + "</p>")
    for p in r.problems:
        parts.append(f"<h3 id=\"p-{_h(_slug(p.name))}\">{_h(p.name)}</h3><p class=\"muted\">{_h(p.heading)}</p>")
        if p.figure is not None:
            parts.append(_html_figure(p.figure))
        if p.note:
            parts.append(f"<p class=\"note\">{_h(p.note)}</p>")
        parts.append(_html_table(p.table))
    parts += [
        "<h2 id=\"provenance\">Provenance</h2>",
        _html_table(Table(("what", "value"), r.provenance)),
        "<h3>Certified optima</h3>",
        "<p class=\"muted\">Every measure is taken against a certified optimum: independent routes (closed form, "
        "conic solver, quasi-Newton) must agree, and NIST StRD problems are checked against the published "
        "certified values (LRE: log relative error, digits).</p>",
        _html_table(r.optima),
    ]
    return _shell(r.title, parts)


def _shell(title: str, body: Sequence[str]) -> str:
    """The page around ``body`` (HTML fragments): inline style, the image check script, nothing fetched."""
    head = [
        "<!DOCTYPE html>",
        "<html lang=\"en\"><head><meta charset=\"utf-8\">",
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">",
        f"<title>{_h(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_h(title)}</h1>",
    ]
    return "\n".join([*head, *body, f"<script>{_SCRIPT}</script>", "</body></html>"]) + "\n"


@dataclass(frozen=True)
class Heading:
    text: str


def figure(name: str, caption: str, fig: Any) -> Figure:
    """A matplotlib figure (from :mod:`benchsuite.figures`) as a page figure (PNG bytes; the figure is freed)."""
    from benchsuite import figures

    return Figure(name, caption, figures.png(fig))


def page(title: str, blocks: Sequence[str | Heading | Figure | Table]) -> str:
    """A self-contained page of the same kind as the run report, for the gate and compare commands.

    ``blocks``: a ``str`` is a paragraph, :class:`Heading` a section heading,
    :class:`Figure` an embedded PNG with its caption, :class:`Table` a table.
    """
    body = []
    for b in blocks:
        if isinstance(b, Heading):
            body.append(f"<h2 id=\"{_h(_slug(b.text))}\">{_h(b.text)}</h2>")
        elif isinstance(b, Figure):
            body.append(_html_figure(b))
        elif isinstance(b, Table):
            body.append(_html_table(b))
        else:
            body.append(f"<p>{_h(b)}</p>")
    return _shell(title, body)


def compare_page(comparison: Any) -> str:
    """The page of a :class:`benchsuite.compare.Comparison`: summary, forest plots, per-case table, method."""
    from benchsuite import figures

    def change(ch: Any) -> str:
        if ch is None:
            return "-"
        iv = ch.interval
        return f"{ch.ratio:.3f}" + ("" if iv is None else f" ({iv[0]:.3f}-{iv[1]:.3f})")

    def count(k: Any) -> str:
        return "-" if k is None else str(k)

    rows = tuple(
        (c.instance, "-" if c.target is None else f"{c.target:.0e}", count(c.iters_a), count(c.iters_b),
         change(getattr(c, "per_step", None)), change(getattr(c, "to_target", None)), c.note)
        for c in comparison.cases)
    blocks: list[str | Heading | Figure | Table] = [
        f"A = {comparison.label_a}, B = {comparison.label_b}.",
        *comparison.summary_lines(),
        figure("compare-forest", "Time ratio B / A per case with its 95 % interval (log scale; below 1: B faster), "
               "time per step and time to target pooled separately; the diamond is the geometric mean over cases "
               "with its interval. Hollow markers: no interval.", figures.compare_figure(comparison)),
        Heading("Cases"),
        Table(("instance", "target", "iterations A", "iterations B", "time per step B/A (95 %)",
               "time to target B/A (95 %)", "note"), rows),
        Heading("Method"),
        f"{comparison.method}.",
    ]
    return page(f"benchsuite compare: {comparison.label_b} against {comparison.label_a}", blocks)


def gate_figures(report: Any, baseline: Any) -> list[Figure]:
    """One picture per failing or changed case: the baseline's fingerprint and the candidate's trace
    overlaid (first seed), the first departure beyond the round-off allowance marked."""
    from benchsuite import figures
    from benchsuite.curves import trace_from_checkpoints
    from benchsuite.gate import departure_iteration

    out = []
    by_key = {c.key: c for c in baseline.cases}
    for i, v in enumerate(report.verdicts):
        if v.verdict == "pass" or i >= len(report.candidates) or v.key not in by_key:
            continue
        base = by_key[v.key]
        cand = report.candidates[i]
        b0 = base.outcomes[0]
        c0 = cand.outcomes[0]
        if c0.trace is None or not b0.checkpoints:
            continue
        k = departure_iteration(b0, report.records[i].outcomes[0], report.config) if report.records else None
        fig = figures.gate_figure(trace_from_checkpoints(b0.checkpoints, b0.fingerprint), c0.trace, base.targets,
                                  title=f"{v.instance}: {v.verdict}", divergence=k, measure=base.measure,
                                  labels=(f"baseline ({report.baseline_rule})", f"candidate ({report.candidate_rule})"))
        what = "no departure beyond round-off at the recorded checkpoints" if k is None else \
            f"first departure beyond the round-off allowance at iteration {k}"
        out.append(figure(f"gate-{_slug(v.instance)}-{i}", f"{v.key}: {what} (seed {b0.seed}).", fig))
    return out


def gate_page(report: Any, baseline: Any) -> str:
    """The page of a gate run: the verdict, notes, one row per case, pictures of failing and changed cases."""
    rows = tuple((v.instance, v.verdict, "; ".join(v.reasons or v.notes) or "-") for v in report.verdicts)
    blocks: list[str | Heading | Figure | Table] = [
        report.summary(),
        f"Candidate {report.candidate_rule} against the baseline {report.baseline} ({report.baseline_rule}); "
        f"{report.config.describe()}.",
        *report.notes,
        Heading("Cases"),
        Table(("instance", "verdict", "why"), rows),
    ]
    pictures = gate_figures(report, baseline)
    if pictures:
        blocks.append(Heading("Failing and changed cases"))
        blocks.extend(pictures)
    return page(f"benchsuite gate: {report.candidate_rule}", blocks)


# -- markdown ---------------------------------------------------------------------------------
def _md_cell(c: Any) -> str:
    return str(c).replace("|", "\\|").replace("\n", " ")


def _md_table(t: Table) -> str:
    lines = ["| " + " | ".join(_md_cell(h) for h in t.headers) + " |",
             "|" + "---|" * len(t.headers)]
    lines += ["| " + " | ".join(_md_cell(c) for c in row) + " |" for row in t.rows]
    return "\n".join(lines)


def render_markdown(r: Report, image_dir: str) -> tuple[str, dict[str, bytes]]:
    """Markdown text and the PNG files it links (``image_dir``/<name>.png, relative to the markdown file).

    The per-problem curves go in a folded ``<details>`` block so a pull-request
    comment stays short.
    """
    files: dict[str, bytes] = {}

    def img(f: Figure) -> str:
        files[f"{f.name}.png"] = f.png
        return f"![{_md_cell(f.caption)}]({image_dir}/{f.name}.png)\n\n*{f.caption}*"

    out = [f"# {r.title}", "", *r.summary, "", *r.notes, "", _md_table(r.summary_table), "", "## Profiles", ""]
    out += [*r.profile_notes, ""]
    for f in r.profiles:
        out += [img(f), ""]
    out += ["## Problems", "", "<details><summary>curves and tables per problem</summary>", ""]
    for p in r.problems:
        out += [f"### {p.name}", "", f"_{p.heading}_", ""]
        if p.figure is not None:
            out += [img(p.figure), ""]
        if p.note:
            out += [p.note, ""]
        out += [_md_table(p.table), ""]
    out += ["</details>", "", "## Provenance", "", _md_table(Table(("what", "value"), r.provenance)), "",
            "### Certified optima", "", _md_table(r.optima), ""]
    return "\n".join(out), files
