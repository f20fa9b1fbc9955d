"""Gate and compare reports: table, Markdown, JUnit XML (well-formed), JSON."""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET

from benchsuite.gate import judge
from benchsuite.report import gate_json, gate_junit, gate_markdown, gate_table
from test_baseline import baseline, case_record
from test_gate import with_iters


def mixed_report():
    good = case_record("quad-good/full", iters_per_seed=[(10, 400)])
    bad = case_record("quad-bad/full", iters_per_seed=[(10, 400)])
    fast = case_record("quad-fast/full", iters_per_seed=[(10, 400)])
    b = baseline(good, bad, fast)
    cands = [good, with_iters(bad, [(10, 900)]), with_iters(fast, [(10, 200)])]
    return judge(b, cands, candidate_rule="mine:Adam <&>")


def test_table_has_every_case_and_the_verdict() -> None:
    text = gate_table(mixed_report())
    assert "FAIL: 2 of 3 cases pass, 1 fail, 1 improved" in text
    lines = text.splitlines()
    first_row = next(i for i, l in enumerate(lines) if l.startswith("---")) + 1
    assert lines[first_row].startswith("FAIL") and "quad-bad" in lines[first_row]  # failures first
    assert "900 iterations vs baseline 400" in text


def test_markdown_verdict_first_failures_then_folded_rest() -> None:
    md = gate_markdown(mixed_report())
    first = md.splitlines()[0]
    assert first.startswith("## ❌ benchsuite gate: FAIL")
    fail_at, details_at = md.index("### Failing cases"), md.index("<details>")
    assert fail_at < md.index("quad-bad") < details_at < md.index("quad-good") < md.index("</details>")
    assert "re-record" in md


def test_junit_is_well_formed_with_one_testcase_per_case() -> None:
    xml = gate_junit(mixed_report())
    root = ET.fromstring(xml.split("\n", 1)[1])  # xml.etree parses it: well-formed
    assert root.tag == "testsuite" and root.get("tests") == "3" and root.get("failures") == "1"
    cases = root.findall("testcase")
    assert sorted(c.get("name") for c in cases) == ["quad-bad/full", "quad-fast/full", "quad-good/full"]
    failing = [c for c in cases if c.find("failure") is not None]
    assert len(failing) == 1 and "900 iterations vs baseline 400" in failing[0].find("failure").get("message")
    props = {p.get("name"): p.get("value") for p in root.find("properties")}
    assert props["candidate_rule"] == "mine:Adam <&>"  # escaped and read back


def test_json_round_trips() -> None:
    doc = json.loads(gate_json(mixed_report()))
    assert doc["passed"] is False
    verdicts = {c["instance"]: c["verdict"] for c in doc["cases"]}
    assert verdicts == {"quad-good": "pass", "quad-bad": "fail", "quad-fast": "improved"}


def test_gate_cells_say_the_outcome_in_words() -> None:
    """Issue 12 item 4: no one-character markers and no legend; the outcome is written in the cell."""
    text = gate_table(mixed_report(), width=200)
    assert "1e-06 400/900 slower" in text and "1e-06 400/200 faster" in text
    assert "regression" not in text and "improvement)" not in text
    assert "900!" not in text and "200+" not in text
    md = gate_markdown(mixed_report())
    assert "400/900 slower" in md and "!" not in md.split("|", 1)[1].replace("<!--", "")


def test_gate_table_fits_the_terminal_with_details_below() -> None:
    """Issue 9: the "why" column was 300-400 characters wide; the table keeps to the width, the reasons follow."""
    rep = mixed_report()
    for width in (60, 80, 120):
        text = gate_table(rep, width=width)
        assert max(len(line) for line in text.splitlines()) <= width, width
    text = gate_table(rep, width=80)
    table_end = text.index("details:")
    assert "900 iterations vs baseline 400" in text[table_end:]  # the full reason, below the table
    assert "900 iterations vs baseline 400" not in text[:table_end]


def test_gate_outputs_carry_the_report_notes() -> None:
    from benchsuite.gate import GateReport

    rep = mixed_report()
    noted = GateReport(**{**rep.__dict__, "notes": ("the baseline was recorded on another machine (CPU a -> b)",)})
    assert "note: the baseline was recorded on another machine" in gate_table(noted, width=100)
    assert "- Note: the baseline was recorded on another machine" in gate_markdown(noted)
    assert json.loads(gate_json(noted))["notes"] == list(noted.notes)
    root = ET.fromstring(gate_junit(noted).split("\n", 1)[1])
    props = {p.get("name"): p.get("value") for p in root.find("properties")}
    assert props["note1"].startswith("the baseline was recorded on another machine")
