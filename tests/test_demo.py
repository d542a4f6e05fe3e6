"""The end-to-end demo on a small invented scenario: every stage runs and leaves its file,
the plan keeps to its budget, and every verdict says which stage decided it and why.

The demo is the slow path of the suite, so it runs once, on the fewest sites that still
train every model (page model, fusion and fetch-value model need some held-out rows with a
page) and leave a plan that fetches."""

from __future__ import annotations

import json

from cascade.cli import EXIT_OK, EXIT_USAGE, main

#: Fewest invented sites for which the demo (seed 0) trains all four models and the plan
#: fetches at least one URL at a 25% budget.
DEMO_SITES = 20


def test_demo_runs_the_whole_cascade(tmp_path) -> None:
    out = tmp_path / "demo"
    code = main(["--quiet", "demo", "--out", str(out), "--sites", str(DEMO_SITES),
                 "--budget", "0.25"])
    assert code == EXIT_OK
    for name in ("telemetry.csv", "plan.jsonl", "fetches.jsonl", "verdicts.jsonl",
                 "report.json", "summary.md", "budget-report/report.html",
                 "model/model.json", "model/page/model.json", "model/fusion/model.json",
                 "model/fetch-value/model.json"):
        assert (out / name).is_file(), name
    report = json.loads((out / "report.json").read_text())
    h = report["headline"]
    plan = [json.loads(line) for line in (out / "plan.jsonl").read_text().splitlines()]
    assert len(plan) == h["test_rows"]
    assert h["fetched_by_plan"] >= 1  # the fetch, extract and fuse stages ran
    assert sum(r["fetch"] for r in plan) == h["fetched_by_plan"] <= int(0.25 * h["test_rows"])
    verdicts = [json.loads(line) for line in (out / "verdicts.jsonl").read_text().splitlines()]
    fused = [v for v in verdicts if v["stage"] == "page"]
    assert len(fused) <= h["fetched_by_plan"]
    assert {v["reason"] for v in verdicts} <= {"fused", "budget:count", "no-gain", "confident",
                                              "page:thin", "under-threshold"} | {
        v["reason"] for v in verdicts if v["reason"].startswith("fetch:")}
    # Every fetch stayed on the loopback farm and none was refused by the address guard.
    fetches = [json.loads(line) for line in (out / "fetches.jsonl").read_text().splitlines()]
    assert all(f["outcome"] == "ok" for f in fetches)
    assert sum(f["fetched_for"] == "plan" for f in fetches) == h["plan_spent"]["fetches"] \
        == h["fetched_by_plan"]


def test_demo_with_too_few_sites_for_a_held_out_split_is_a_usage_error(
        tmp_path, capsys) -> None:
    code = main(["--quiet", "demo", "--out", str(tmp_path / "demo"), "--sites", "1"])
    assert code == EXIT_USAGE
    assert "--sites" in capsys.readouterr().err
