"""The README's first command finds the depot sample's planted stories (sample_db/README.md)."""

from __future__ import annotations

import importlib.util
import json
import sys
from pathlib import Path

from monitor.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _depots():
    spec = importlib.util.spec_from_file_location("segwatch_sample_depots", ROOT / "sample_db" / "depots.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("segwatch_sample_depots", mod)
    spec.loader.exec_module(mod)
    return mod


def test_backfill_finds_the_planted_stories(tmp_path, capsys):
    depots = _depots()
    depots.build(tmp_path / "depots.sqlite")
    text = (ROOT / "configs" / "demo.yaml").read_text()
    text = text.replace("sqlite:///../sample_db/depots.sqlite", f"sqlite:///{tmp_path / 'depots.sqlite'}")
    text = text.replace("sqlite:///../.segwatch/demo-history.sqlite", f"sqlite:///{tmp_path / 'h.sqlite'}")
    text = text.replace("../logs/demo-alerts.jsonl", str(tmp_path / "alerts.jsonl"))
    cfg = tmp_path / "demo.yaml"
    cfg.write_text(text)
    assert main(["backfill", str(cfg), "--from", "2026-W06", "--to", "2026-W18", "--json"]) == 0
    docs = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    events = {(d["period"], e["kind"], e["metric"], e["segment"]) for d in docs for e in d["events"]}
    stories = depots.STORIES
    opening = stories["opening"]
    assert (opening.period_ids[0], "segment_new", None, opening.depots[0]) in events
    missing = stories["missing_week"]
    assert (missing.period_ids[0], "segment_missing", None, missing.depots[0]) in events
    # the drift: Quarry flagged above the rest on dwell_hours by W16 at the latest
    drift = [p for p, k, m, s in events if k == "emerged" and m == "dwell_hours" and s == stories["drift"].depots[0]]
    assert drift and min(drift) <= "2026-W16"
    # the spreads break from W14: the watched equal-spread check fails there
    assert ("2026-W14", "assumption_broken", "counter_wait_min", None) in events
    # the burst of NULL sort_minutes trips the 5% data-quality threshold
    burst = stories["null_burst"]
    assert (burst.period_ids[0], "data_quality", "sort_minutes", None) in events
