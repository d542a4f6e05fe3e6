"""What each unit of fetch budget buys: cascade's planner against random order,
lowest-confidence-first and the oracle, on WebKB (leave one university out) and the demo.

    python benchmarks/page_model.py --datasets webkb,demo --arrays out/arrays
    python benchmarks/budget.py --arrays out/arrays --json out/budget.json

The first command fits the URL model, page model and fusion per split (the slow part) and
saves, per split, both models' probabilities on the held-out rows and on the stacking
(out-of-fold) rows of training, with each row's URL and domain. This script then fits the
fetch-value model on the stacking rows only (with their URLs and page probabilities), ranks
the held-out rows, and measures accuracy at each budget for every strategy. It also reports
the rank correlation of each strategy's order with what a fetch did (+1 fixed, -1 broke).

Spread: for each of ``--seeds`` seeds the fetch-value model is fitted on a bootstrap resample of the
stacking rows and all strategies are measured on a bootstrap resample of the held-out rows
(the same resample for all, so differences are paired). Seed 0 also reports the plain run
(no resampling). The held-out rows are first visits: the store knows none of their domains.

Two objectives: "accuracy" (the fetch-value model fitted with unit costs, compared on accuracy)
and, on the demo whose taxonomy weighs categories, "cost" (taxonomy costs, compared on the
cost-weighted error). A cost-aware planner gives up some plain accuracy to avoid costly
mistakes, so each is compared on the figure it optimizes.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy.stats import spearmanr

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import machine, write_json  # noqa: E402

from cascade.fetch_value import FetchValueModel, fetch_outcomes  # noqa: E402
from cascade.report import (  # noqa: E402
    DEFAULT_BUDGETS,
    STRATEGIES,
    budget_curve,
    budget_for_share,
    strategy_orders,
)
from cascade.taxonomy import demo_taxonomy  # noqa: E402

FINE = np.round(np.arange(0, 101) / 100.0, 2)


def _costs(name: str, classes: list[str]) -> np.ndarray:
    if name != "demo":
        return np.ones(len(classes))  # WebKB has no cost notion: every mistake weighs 1
    return demo_taxonomy().costs(classes)


def _curves(y, pu, pf, gain, costs, counts, seed: int) -> dict[str, dict]:
    out: dict[str, dict] = {s: {} for s in STRATEGIES}
    for metric in ("accuracy", "cost_weighted_error"):  # the oracle's order is per metric
        orders = strategy_orders(y, pu, pf, gain, counts, costs, seed=seed, metric=metric)
        for s in STRATEGIES:
            out[s][metric] = budget_curve(y, pu, pf, orders[s], FINE, counts, costs)[metric]
    return out


def _demo_counts(urls: np.ndarray) -> np.ndarray:
    """Lookup counts of the demo's held-out URLs, from the same generated telemetry."""
    from cascade.scenario import generate_telemetry
    from cascade.urls import normalize

    by_url: dict[str, int] = {}
    for r in generate_telemetry(seed=0, n_sites=2000):
        key = normalize(r.url).url
        by_url[key] = by_url.get(key, 0) + int(r.count)
    return np.array([by_url.get(str(u), 1) for u in urls], dtype=np.float64)


def run_split(path: Path, seeds: int, by_lookups: bool = False,
              objective: str = "accuracy") -> dict:
    """One split. ``objective`` "accuracy": the fetch-value model is fitted with unit costs and
    strategies are compared on accuracy; "cost": with the taxonomy's costs, compared on the
    cost-weighted error (the planner's own objective then)."""
    d = np.load(path, allow_pickle=False)
    classes = [str(c) for c in d["classes"]]
    name = "demo" if path.stem == "demo" else path.stem
    costs = _costs(name, classes)
    fit_costs = costs if objective == "cost" else np.ones(len(classes))
    metric = "accuracy" if objective == "accuracy" else "cost_weighted_error"
    sign = 1.0 if objective == "accuracy" else -1.0  # higher is better after the sign
    y, pu, pf = d["y"], d["url_proba"], d["fused_proba"]
    oy, opu, opf, odom = d["oof_y"], d["oof_url_proba"], d["oof_fused_proba"], d["oof_domain"]
    opp, ourl, url = d["oof_page_proba"], d["oof_url"], d["url"]
    counts = _demo_counts(d["url"]) if by_lookups else None
    n, on = len(y), len(oy)
    runs = []
    for s in range(seeds + 1):  # run 0: no resampling; runs 1..seeds: bootstrap
        rng = np.random.default_rng(s)
        tr = np.arange(on) if s == 0 else rng.integers(0, on, on)
        te = np.arange(n) if s == 0 else rng.integers(0, n, n)
        cm = FetchValueModel(seed=s).fit(opu[tr], opf[tr], oy[tr], costs=fit_costs,
                                         domains=[str(x) for x in odom[tr]],
                                         urls=[str(u) for u in ourl[tr]], page_proba=opp[tr])
        gain = cm.expected_gain(pu[te], urls=[str(u) for u in url[te]])["gain"]
        if s == 0:
            settings = {**cm.get_params(), "features": cm.feature_names()}
            net = fetch_outcomes(y, pu, pf)
            net = (net == 2).astype(float) - (net == 1)  # +1 fixed, -1 broke, 0 otherwise
            # reference implementation: scipy.stats.spearmanr (rank correlation)
            rank_corr = {"planner": round(float(spearmanr(gain, net).statistic), 4),
                         "lowest-confidence": round(float(spearmanr(-pu.max(axis=1),
                                                                    net).statistic), 4)}
        w = None if counts is None else counts[te].astype(float)
        runs.append(_curves(y[te], pu[te], pf[te], gain, costs, w, seed=s))
    plain, boot = runs[0], runs[1:]
    table = []
    for b in DEFAULT_BUDGETS:
        j = int(round(b * 100))
        row = {"budget": b}
        for s in STRATEGIES:
            row[s] = round(plain[s][metric][j], 4)
        diffs = [sign * (r["planner"][metric][j] - r["lowest-confidence"][metric][j])
                 for r in boot]
        row["planner_minus_lowconf"] = {"plain": round(sign * (row["planner"] -
                                                               row["lowest-confidence"]), 4),
                                        "boot_mean": round(float(np.mean(diffs)), 4),
                                        "boot_min": round(float(np.min(diffs)), 4),
                                        "boot_max": round(float(np.max(diffs)), 4)}
        other = "cost_weighted_error" if objective == "accuracy" else "accuracy"
        row[f"planner_{other}"] = round(plain["planner"][other][j], 4)
        table.append(row)
    fine_diff = sign * np.array([np.array(r["planner"][metric]) -
                                 np.array(r["lowest-confidence"][metric]) for r in boot])
    def score(curve: dict) -> np.ndarray:  # higher is better, in the compared metric
        return sign * np.array(curve[metric])

    gain_all = score(plain["planner"])[-1] - score(plain["planner"])[0]
    shares = {s: {f"{int(q * 100)}%": budget_for_share(FINE, score(plain[s]), q, gain_all)
                  for q in (0.9, 0.95)} for s in STRATEGIES}
    boot_share = [budget_for_share(FINE, score(r["planner"]), 0.9) for r in boot]
    return {"objective": objective, "metric": metric, "fetch_value_model": settings,
            "rank_correlation_with_fixed_minus_broke": rank_corr,
            "rows": int(n), "stacking_rows": int(on), "classes": len(classes),
            "weighted_by_lookups": counts is not None,
            "url_only_accuracy": round(plain["planner"]["accuracy"][0], 4),
            "fetch_all_accuracy": round(plain["planner"]["accuracy"][-1], 4),
            "oracle_ceiling": round(max(plain["oracle"]["accuracy"]), 4),
            f"url_only_{metric}": round(plain["planner"][metric][0], 4),
            f"fetch_all_{metric}": round(plain["planner"][metric][-1], 4),
            f"oracle_best_{metric}": round(float(max(sign * np.array(plain["oracle"][metric])))
                                           * sign, 4),
            "table": table, "budget_for_gain_share": shares,
            "planner_budget_for_90pct_boot": boot_share,
            "fine_grid_planner_minus_lowconf": {
                "points_below_zero_mean": int((fine_diff.mean(axis=0) < -1e-9).sum()),
                "worst_mean": round(float(fine_diff.mean(axis=0).min()), 4),
                "worst_point": float(FINE[int(fine_diff.mean(axis=0).argmin())])}}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--arrays", type=Path, default=Path("out/arrays"))
    ap.add_argument("--json", help="also write the JSON here")
    ap.add_argument("--seeds", type=int, default=5)
    args = ap.parse_args()
    out: dict = {"benchmark": "budget", "machine": machine(), "seeds": args.seeds, "splits": {}}
    files = sorted(args.arrays.glob("*.npz"))
    if not files:
        sys.exit(f"no arrays under {args.arrays}: run benchmarks/page_model.py --arrays first")
    for path in files:
        out["splits"][path.stem] = run_split(path, args.seeds)
        if path.stem == "demo":  # WebKB has no costs and no lookup counts
            out["splits"]["demo-cost"] = run_split(path, args.seeds, objective="cost")
            out["splits"]["demo-by-lookups"] = run_split(path, args.seeds, by_lookups=True)
        print(f"{path.stem}: done", file=sys.stderr, flush=True)
    write_json(out, args.json)


if __name__ == "__main__":
    main()
