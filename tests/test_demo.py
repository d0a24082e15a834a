"""`drift demo` end to end on the invented scenario: the three stories come out as designed."""

from __future__ import annotations

import json
from pathlib import Path

from drift.demo import run_demo


def test_demo_runs_and_tells_its_three_stories(tmp_path: Path) -> None:
    res = run_demo(tmp_path / "demo")
    assert res.report.exists() and res.report_html is not None and res.report_html.exists()
    assert res.digest is not None and res.digest.exists() and "data:image/png;base64," in res.digest.read_text()
    text = res.report.read_text(encoding="utf-8")
    assert "north — keep" in text
    assert "east — refit" in text
    assert "west — data late" in text
    assert "statistical evidence, not certainty" in text
    # at least the CUSUM chart with its bounds, as a PNG
    png = (res.report.parent / "01-east-cusum.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    lines = (res.out / "alerts" / "alerts.jsonl").read_text(encoding="utf-8").splitlines()
    actions = {(json.loads(x)["model"], json.loads(x)["action"]) for x in lines}
    assert ("east", "refit") in actions and ("west", "data-late") in actions
    assert not any(m == "north" for m, _ in actions)
