"""Reports of the gate and of the speed-up comparison.

Four forms for each: a plain-text terminal table, Markdown for a pull-request
comment (verdict first, failing cases next, everything else folded in a
``<details>`` block), JUnit XML for CI systems (gate only: one ``<testcase>``
per gate case, a ``<failure>`` carrying the reasons), and JSON.
All functions here are pure: they take report objects and return text.
"""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from collections.abc import Sequence
from typing import Any

from benchsuite.compare import Change, Comparison
from benchsuite.gate import CaseVerdict, GateReport, TargetCheck

__all__ = [
    "table",
    "gate_table",
    "gate_markdown",
    "gate_junit",
    "gate_json",
    "compare_table",
    "compare_markdown",
    "compare_json",
]

_MARK = {"pass": "pass", "improved": "improved", "fail": "FAIL"}


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A left-aligned plain-text table with a rule under the header."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _it(v: float) -> str:
    if math.isinf(v):
        return "-"
    return f"{v:.0f}" if float(v).is_integer() else f"{v:.1f}"


#: the outcome of a target, in words, as the cells show it (nothing for "same" / "unreached")
_OUTCOME_WORDS = {
    "slower": "slower",
    "lost": "lost",
    "shifted": "later on every seed",
    "faster": "faster",
    "gained": "gained",
    "transient": "transient in baseline",
}


def _targets_cell(checks: Sequence[TargetCheck]) -> str:
    """e.g. ``1e-02 12/12, 1e-06 96/130 slower``: baseline/candidate and the outcome in words."""
    parts = []
    for t in checks:
        word = _OUTCOME_WORDS.get(t.outcome, "")
        parts.append(f"{t.target:.0e} {_it(t.baseline)}/{_it(t.candidate)}" + (f" {word}" if word else ""))
    return ", ".join(parts)


def _targets_compact(checks: Sequence[TargetCheck]) -> str:
    """The targets whose outcome is not "same", then how many are (for narrow terminals)."""
    odd = [t for t in checks if t.outcome not in ("same", "unreached")]
    rest = len(checks) - len(odd)
    text = _targets_cell(odd)
    if rest:
        text += (", " if text else "") + f"{rest} as baseline"
    return text


def _why(v: CaseVerdict) -> str:
    return "; ".join(v.reasons or v.notes)


def _roundoff(v: CaseVerdict) -> str:
    if not v.has_envelope:
        return "no round-off envelope recorded"
    if v.roundoff_from is None:
        return "not round-off-dominated"
    return f"round-off-dominated from iteration {v.roundoff_from}"


def _clip(text: str, width: int) -> str:
    return text if len(text) <= width else text[: max(width - 1, 1)] + "…"


def _fitted_table(headers: Sequence[str], rows: Sequence[Sequence[str]], width: int, shrink: Sequence[int]) -> str:
    """:func:`table` narrowed to ``width`` by clipping the ``shrink`` columns, widest first (at least 8 wide)."""
    rows = [[str(c) for c in r] for r in rows]
    while True:
        cells = [list(headers)] + rows
        widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
        total = sum(widths) + 2 * (len(widths) - 1)
        col = max(shrink, key=lambda i: widths[i])
        new = max(widths[col] - (total - width), 8, len(headers[col]))
        if total <= width or new >= widths[col]:
            return table(headers, rows)
        rows = [[_clip(c, new) if i == col else c for i, c in enumerate(r)] for r in rows]


def _terminal_width() -> int:
    import shutil

    return max(shutil.get_terminal_size((100, 24)).columns, 40)


# ------------------------------------------------------------------- gate
def gate_table(report: GateReport, width: int | None = None) -> str:
    """Terminal table within ``width`` (default: the terminal's), the details below it, then the verdict."""
    import textwrap

    width = width or _terminal_width()
    ordered = sorted(report.verdicts, key=lambda v: (v.verdict != "fail", v.key))
    rows = [(_MARK[v.verdict], v.instance, v.candidate_status, _targets_cell(v.targets)) for v in ordered]
    out = [
        *textwrap.wrap(f"gate: {report.candidate_rule} against {report.baseline} (recorded with {report.baseline_rule})",
                       width, subsequent_indent="  "),
        *textwrap.wrap(report.config.describe(), width, subsequent_indent="  "),
    ]
    for n in report.notes:
        out += textwrap.wrap(f"note: {n}", width, subsequent_indent="  ")
    out += textwrap.wrap("iterations to each target (held crossing): baseline/candidate", width)
    headers = ("verdict", "instance", "status", "iterations to target")
    text = table(headers, rows)
    if max(len(line) for line in text.splitlines()) > width:  # narrow: only the targets that moved
        rows = [(r[0], r[1], r[2], _targets_compact(v.targets)) for r, v in zip(rows, ordered)]
        text = _fitted_table(headers, rows, width, (1, 3))
    out.append(text)
    details = [v for v in ordered if v.reasons or v.notes]
    if details:
        out.append("")
        out.append("details:")
        for v in details:
            out += textwrap.wrap(f"{v.instance} ({v.verdict}; {_roundoff(v)}):", width, subsequent_indent="    ")
            for line in (*v.reasons, *v.notes):
                out += textwrap.wrap(line, width, initial_indent="  - ", subsequent_indent="    ")
    out += textwrap.wrap(report.summary(), width, subsequent_indent="  ")
    return "\n".join(out)


def _md_escape(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _md_rows(verdicts: Sequence[CaseVerdict]) -> list[str]:
    lines = ["| verdict | case | iterations (baseline/candidate) | round-off | why |", "|---|---|---|---|---|"]
    for v in verdicts:
        lines.append(
            f"| {_MARK[v.verdict]} | `{_md_escape(v.key)}` | {_md_escape(_targets_cell(v.targets))} | "
            f"{_md_escape(_roundoff(v))} | {_md_escape(_why(v))} |"
        )
    return lines


def gate_markdown(report: GateReport) -> str:
    """A pull-request comment: verdict first, failing cases, the rest folded."""
    icon = "✅" if report.passed else "❌"
    out = [f"## {icon} benchsuite gate: {report.summary()}", ""]
    out.append(
        f"Candidate `{_md_escape(report.candidate_rule)}` against baseline `{_md_escape(report.baseline)}` "
        f"(recorded with `{_md_escape(report.baseline_rule)}`); {_md_escape(report.config.describe())}."
    )
    out.append("")
    for n in report.notes:
        out.append(f"- Note: {_md_escape(n)}")
    if report.notes:
        out.append("")
    if report.failures:
        out.append("### Failing cases")
        out.append("")
        out += _md_rows(report.failures)
        out.append("")
    if report.improvements:
        out.append("Some cases improved: check the candidate against the method it implements (`benchsuite conform`), "
                   "then re-record the baseline (`benchsuite baseline ... --force`) to lock the gain in.")
        out.append("")
    rest = [v for v in report.verdicts if not v.failed]
    if rest:
        out.append(f"<details><summary>{len(rest)} passing case(s)</summary>")
        out.append("")
        out += _md_rows(rest)
        out.append("")
        out.append("</details>")
    return "\n".join(out) + "\n"


def gate_junit(report: GateReport) -> str:
    """JUnit XML: one testsuite, one testcase per gate case."""
    suite = ET.Element(
        "testsuite",
        name="benchsuite.gate",
        tests=str(len(report.verdicts)),
        failures=str(len(report.failures)),
        errors="0",
        skipped="0",
    )
    props = ET.SubElement(suite, "properties")
    for k, v in (
        ("baseline", report.baseline),
        ("baseline_rule", report.baseline_rule),
        ("candidate_rule", report.candidate_rule),
        ("config", report.config.describe()),
        *((f"note{i + 1}", n) for i, n in enumerate(report.notes)),
    ):
        ET.SubElement(props, "property", name=k, value=v)
    for v in report.verdicts:
        tc = ET.SubElement(suite, "testcase", classname=f"benchsuite.gate.{v.instance}", name=v.key)
        detail = _targets_cell(v.targets)
        if v.failed:
            fail = ET.SubElement(tc, "failure", message="; ".join(v.reasons), type="GateFailure")
            fail.text = ("\n".join(v.reasons) + f"\niterations per target (baseline/candidate): {detail}\n"
                         + "".join(f"{n}\n" for n in v.notes) + f"{_roundoff(v)}\n")
        else:
            out = ET.SubElement(tc, "system-out")
            out.text = "\n".join([f"{v.verdict}: {detail}", *v.notes, _roundoff(v)]) + "\n"
    ET.indent(suite)
    return '<?xml version="1.0" encoding="utf-8"?>\n' + ET.tostring(suite, encoding="unicode") + "\n"


def _num(v: float) -> float | None:
    return None if math.isinf(v) or math.isnan(v) else v


def gate_json(report: GateReport) -> str:
    doc = {
        "passed": report.passed,
        "summary": report.summary(),
        "baseline": report.baseline,
        "baseline_rule": report.baseline_rule,
        "candidate_rule": report.candidate_rule,
        "config": {
            "slack_iters": report.config.slack_iters,  # null: 0 where out of round-off's reach, 1 elsewhere
            "slack_rel": report.config.slack_rel,
            "noise_factor": report.config.noise_factor,
            "exact": report.config.exact,
            "exact_rtol": report.config.exact_rtol,
            "exact_atol": report.config.exact_atol,
            "envelope_k": report.config.envelope_k,
            "sign_alpha": report.config.sign_alpha,
        },
        "notes": list(report.notes),
        "cases": [
            {
                "key": v.key,
                "instance": v.instance,
                "verdict": v.verdict,
                "reasons": list(v.reasons),
                "notes": list(v.notes),
                "baseline_status": v.baseline_status,
                "candidate_status": v.candidate_status,
                "roundoff_from": v.roundoff_from,
                "has_envelope": v.has_envelope,
                "targets": [
                    {
                        "target": t.target,
                        "baseline_iters": _num(t.baseline),
                        "candidate_iters": _num(t.candidate),
                        "allowance": t.allowance,
                        "outcome": t.outcome,
                        "seeds_later": t.seeds_later,
                        "seeds_earlier": t.seeds_earlier,
                        "sign_p": t.sign_p,
                        "dominated": t.dominated,
                    }
                    for t in v.targets
                ],
            }
            for v in report.verdicts
        ],
    }
    return json.dumps(doc, indent=2, sort_keys=True) + "\n"


# ---------------------------------------------------------------- compare
#: JSON schema tag of ``compare --json`` (2: signed changes with intervals, per step and to target apart)
COMPARE_SCHEMA = "benchsuite-compare/2"


def _cell(c: Change | None) -> str:
    return "-" if c is None else c.cell()


def _compare_rows(result: Comparison) -> list[tuple[str, ...]]:
    rows = []
    for c in result.cases:
        its = "-" if c.iters_a is None else f"{c.iters_a}/{c.iters_b}"
        target = "-" if c.per_step is None else ("steps" if c.target is None else f"{c.target:.0e}")
        rows.append((c.instance, target, its, _cell(c.per_step), _cell(c.to_target), c.note))
    return rows


_COMPARE_HEAD = ("instance", "target", "iters A/B", "time per step, B vs A", "time to target, B vs A", "note")
_COMPARE_LEGEND = (
    "changes are B's time against A's with the 95 % interval in brackets: higher / lower -- the interval "
    "lies above / below no change; unclear -- it includes no change"
)


def compare_table(result: Comparison) -> str:
    """Terminal table of a comparison: per case, then the summary lines."""
    timed = any(c.per_step is not None and c.per_step.se is not None for c in result.cases)
    pairs = f"; {result.pairs} pairs per case" if timed else ""
    head = f"A = {result.label_a}\nB = {result.label_b}\n{result.method}{pairs}\n{_COMPARE_LEGEND}\n"
    return head + table(_COMPARE_HEAD, _compare_rows(result)) + "\n" + result.summary()


def compare_markdown(result: Comparison) -> str:
    """Markdown: the headline first, the other summary lines, the per-case table folded."""
    lines = result.summary_lines()
    out = [f"## benchsuite compare: {_md_escape(lines[0])}", ""]
    out += [f"- {_md_escape(line)}" for line in lines[1:]]
    if len(lines) > 1:
        out.append("")
    out.append(f"A = `{_md_escape(result.label_a)}`, B = `{_md_escape(result.label_b)}`. {_md_escape(result.method)}.")
    changed = [c for c in result.cases if c.iters_a is not None and c.iters_a != c.iters_b]
    if changed:
        out += ["", f"**Iteration counts differ on {len(changed)} case(s)**: there the time to target changes with "
                "the rule's behaviour; the time per step is the step's own cost."]
    out += ["", f"<details><summary>{len(result.cases)} case(s)</summary>", "", _md_escape(_COMPARE_LEGEND), ""]
    out.append("| " + " | ".join(_COMPARE_HEAD) + " |")
    out.append("|" + "---|" * len(_COMPARE_HEAD))
    out += ["| " + " | ".join(_md_escape(v) for v in row) + " |" for row in _compare_rows(result)]
    out += ["", "</details>"]
    return "\n".join(out) + "\n"


def _change_doc(c: Change | None) -> dict[str, Any] | None:
    if c is None:
        return None
    iv = c.interval
    return {
        "ratio": c.ratio,
        "change": c.change,
        "interval": None if iv is None else [iv[0], iv[1]],
        "change_interval": None if iv is None else [iv[0] - 1.0, iv[1] - 1.0],
        "excludes_no_change": c.excludes_no_change,  # null: unknown (no interval)
        "direction": None if iv is None else c.direction,
        "cases": c.cases,
    }


def compare_json(result: Comparison) -> str:
    v = result.verdict
    doc = {
        "schema": COMPARE_SCHEMA,
        "a": result.label_a,
        "b": result.label_b,
        "method": result.method,
        "pairs": result.pairs,
        "process_pairs": result.process_pairs,
        "per_step": _change_doc(result.per_step),
        "to_target": _change_doc(result.to_target),
        "lost": {side: [{"instance": name, "targets": list(ts)} for name, ts in cases]
                 for side, cases in result.lost.items()},
        "speed_limit": None if v is None else {
            "fail_above": v.limit, "verdict": v.outcome, "exit_code": v.exit_code, "reason": v.reason},
        "summary": result.summary_lines(),
        "cases": [
            {
                "instance": c.instance,
                "status_a": c.status_a,
                "status_b": c.status_b,
                "target": c.target,
                "iters_a": c.iters_a,
                "iters_b": c.iters_b,
                "iter_ratio": c.iter_ratio,
                "per_step": _change_doc(c.per_step),
                "to_target": _change_doc(c.to_target),
                "lost_a": list(c.lost_a),
                "lost_b": list(c.lost_b),
                "times_a": list(c.times_a),
                "times_b": list(c.times_b),
                "process_pair": list(c.groups),
                "note": c.note,
            }
            for c in result.cases
        ],
    }
    return json.dumps(doc, indent=2, sort_keys=True) + "\n"
