"""What each unit of fetch budget buys, on a labelled held-out set: numbers, plots, HTML.

Inputs are arrays for the same labelled rows: the true class, the URL model's probabilities,
the fused probabilities the row would get if its page were fetched (the URL's own where the
fetch failed or the page was thin), the fetch-value model's expected gain, and optionally lookup
counts. Fetch strategies compared at every budget, all on the same rows:

- ``planner``: cascade's fetch-value model (highest expected gain first);
- ``lowest-confidence``: the URL model's least confident verdicts first;
- ``random``: a uniform random order (mean over seeds);
- ``oracle``: fetches exactly the URLs whose fetch fixes the verdict, most valuable first,
  and nothing else: the ceiling no planner can pass.

A budget is a share of the distinct URLs fetched; accuracy and the cost-weighted error
are weighted by lookup count when counts are given (the planner is then told the counts).
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from cascade import __version__
from cascade import metrics as M
from cascade.evaluate import risk_breakdown

__all__ = [
    "DEFAULT_BUDGETS",
    "STRATEGIES",
    "budget_curve",
    "budget_for_share",
    "build_report",
    "strategy_orders",
    "write_report",
]

STRATEGIES = ("planner", "lowest-confidence", "random", "oracle")
DEFAULT_BUDGETS = (0.0, 0.05, 0.10, 0.20, 0.30, 0.50, 1.0)
ROC_FPR = 1e-3


def _arrays(y: Any, url_proba: Any, fused_proba: Any, counts: Any, costs: Any
            ) -> tuple[np.ndarray, ...]:
    y = np.asarray(y, dtype=np.int64)
    pu = np.asarray(url_proba, dtype=np.float64)
    pf = np.asarray(fused_proba, dtype=np.float64)
    if pu.ndim != 2 or pf.shape != pu.shape or y.shape != (len(pu),) or len(pu) == 0:
        raise ValueError("y (n,), url_proba and fused_proba (n, k) must match and be non-empty")
    w = np.ones(len(y)) if counts is None else np.asarray(counts, dtype=np.float64)
    c = np.ones(pu.shape[1]) if costs is None else np.asarray(costs, dtype=np.float64)
    if w.shape != y.shape or c.shape != (pu.shape[1],):
        raise ValueError("counts must be (n,) and costs (k,)")
    if y.min() < 0 or y.max() >= pu.shape[1]:
        raise ValueError(f"y holds a class index outside 0..{pu.shape[1] - 1}")
    if not (np.isfinite(w).all() and (w >= 0).all() and w.sum() > 0):
        raise ValueError("counts must be finite, >= 0, and not all 0")
    if not (np.isfinite(c).all() and (c > 0).all()):
        raise ValueError("costs must be finite positive numbers")
    return y, pu, pf, w, c


def _fetched(fraction: float, n: int) -> int:
    """URLs fetched at a budget share: rounded down, as ``Budget.count_limit`` does."""
    f = float(fraction)
    if not 0.0 <= f <= 1.0:
        raise ValueError(f"a budget share must lie in [0, 1], got {fraction}")
    return int(math.floor(f * n + 1e-9))


def strategy_orders(y: Any, url_proba: Any, fused_proba: Any, gain: Any,
                    counts: Any = None, costs: Any = None, seed: int = 0,
                    metric: str = "accuracy") -> dict[str, np.ndarray]:
    """Row order in which each strategy fetches. The oracle's order lists only its fixes.

    ``gain`` is the fetch-value model's expected gain per lookup; the planner ranks by gain times
    lookup count, as ``cascade.budget.plan`` does. Lowest-confidence ignores counts. The
    oracle ranks its fixes by what each is worth to ``metric``: lookups for "accuracy",
    lookups x cost of the true category for "cost_weighted_error"."""
    y, pu, pf, w, c = _arrays(y, url_proba, fused_proba, counts, costs)
    n = len(y)
    idx = np.arange(n)
    gain = np.asarray(gain, dtype=np.float64)
    conf = pu.max(axis=1)
    if metric not in ("accuracy", "cost_weighted_error"):
        raise ValueError(f"metric must be 'accuracy' or 'cost_weighted_error', not {metric!r}")
    worth = w if metric == "accuracy" else w * c[y]
    delta = worth * ((pf.argmax(1) == y).astype(float) - (pu.argmax(1) == y))
    fixes = np.flatnonzero(delta > 0)
    return {
        "planner": np.lexsort((idx, -gain * w)),
        "lowest-confidence": np.lexsort((idx, conf)),
        "random": np.random.default_rng(seed).permutation(n),
        "oracle": fixes[np.lexsort((fixes, -delta[fixes]))],
    }


def budget_curve(y: Any, url_proba: Any, fused_proba: Any, order: Sequence[int],
                 fractions: Sequence[float], counts: Any = None, costs: Any = None
                 ) -> dict[str, list[float]]:
    """Accuracy and cost-weighted error when the first ``round(f * n)`` rows of ``order``
    are fetched (fused verdict) and the rest keep the URL verdict, for each ``f``."""
    y, pu, pf, w, c = _arrays(y, url_proba, fused_proba, counts, costs)
    n = len(y)
    order = np.asarray(order, dtype=np.int64)
    url_ok = (pu.argmax(1) == y).astype(float)
    fused_ok = (pf.argmax(1) == y).astype(float)
    cw = w * c[y]
    base_acc = float((w * url_ok).sum() / w.sum())
    base_err = float((cw * (1 - url_ok)).sum() / cw.sum())
    d_acc = np.concatenate([[0.0], np.cumsum((w * (fused_ok - url_ok))[order])]) / w.sum()
    d_err = np.concatenate([[0.0], np.cumsum((cw * (fused_ok - url_ok))[order])]) / cw.sum()
    acc, err = [], []
    for f in fractions:
        m = min(_fetched(f, n), len(order))
        acc.append(base_acc + float(d_acc[m]))
        err.append(base_err - float(d_err[m]))
    return {"accuracy": acc, "cost_weighted_error": err}


def budget_for_share(fractions: Sequence[float], accuracy: Sequence[float],
                     share: float, total: float | None = None) -> float | None:
    """Smallest budget in ``fractions`` whose accuracy gain over budget 0 reaches ``share``
    of ``total`` (default: this curve's own gain at its largest budget, i.e. fetching
    everything). None if it never does, or there is no gain to share."""
    acc = np.asarray(accuracy, dtype=np.float64)
    total = float(acc[-1] - acc[0]) if total is None else float(total)
    if not total > 0:
        return None
    hit = np.flatnonzero(acc - acc[0] >= share * total - 1e-12)
    return float(fractions[int(hit[0])]) if hit.size else None


def _mixed(pu: np.ndarray, pf: np.ndarray, order: np.ndarray, m: int) -> np.ndarray:
    out = pu.copy()
    out[order[:m]] = pf[order[:m]]
    return out


def build_report(
    y: Any,
    url_proba: Any,
    fused_proba: Any,
    gain: Any,
    classes: Sequence[str],
    costs: Any = None,
    counts: Any = None,
    budgets: Sequence[float] = DEFAULT_BUDGETS,
    operating_budget: float = 0.30,
    precision_target: float = 0.95,
    seeds: int = 5,
    title: str = "cascade budget report",
    context: dict[str, Any] | None = None,
    fetch_costs: Any = None,
    domains: Sequence[str] | None = None,
    concurrency: int = 64,
    risk: dict[str, str] | None = None,
) -> dict[str, Any]:
    """Every number of the report as a JSON-ready dict (``write_report`` draws it).

    ``fetch_costs`` (a ``FetchCosts``, e.g. learned from earlier fetch results) and the
    rows' ``domains`` turn each budget row into operational units: bytes, fetch-seconds,
    wall-clock seconds at ``concurrency`` fetches in flight, and expected failures; without
    them those use ``FetchCosts``'s defaults and the report says so."""
    risk_levels = dict(risk) if risk is not None else None  # ``risk`` is reused below
    y, pu, pf, w, c = _arrays(y, url_proba, fused_proba, counts, costs)
    n, k = pu.shape
    if len(classes) != k:
        raise ValueError(f"{len(classes)} class names for {k} probability columns")
    if int(seeds) < 1:
        raise ValueError(f"seeds must be at least 1, got {seeds}")
    budgets = [float(b) for b in budgets]
    for b in [*budgets, operating_budget]:
        _fetched(b, n)  # validates the share
    fine = np.round(np.arange(0, 101) / 100.0, 2)

    def curves_at(fractions: Sequence[float]) -> dict[str, Any]:
        out: dict[str, Any] = {}
        orders = {(s, m): strategy_orders(y, pu, pf, gain, w, c, seed=s, metric=m)
                  for s in range(seeds) for m in ("accuracy", "cost_weighted_error")}
        for name in STRATEGIES:
            per_seed = []
            for s in range(seeds if name == "random" else 1):
                per_seed.append({m: budget_curve(y, pu, pf, orders[s, m][name], fractions, w,
                                                 c)[m]
                                 for m in ("accuracy", "cost_weighted_error")})
            out[name] = {m: np.mean([p[m] for p in per_seed], axis=0).tolist()
                         for m in ("accuracy", "cost_weighted_error")}
            if name == "random":
                out[name]["accuracy_min"] = np.min([p["accuracy"] for p in per_seed],
                                                   0).tolist()
                out[name]["accuracy_max"] = np.max([p["accuracy"] for p in per_seed],
                                                   0).tolist()
        return out

    curves = curves_at(fine)
    at_budgets = curves_at(budgets)
    from cascade.budget import FetchCosts

    costs_given = fetch_costs is not None
    fetch_costs = fetch_costs if costs_given else FetchCosts()
    per_row = np.array([fetch_costs.estimate(d) for d in (domains or [""] * n)],
                       dtype=np.float64).reshape(n, 3)
    plan_order = strategy_orders(y, pu, pf, gain, w, c)["planner"]
    correct_u = (pu.argmax(axis=1) == y).astype(np.float64)
    correct_f = (pf.argmax(axis=1) == y).astype(np.float64)
    # 95% percentile bootstrap (Efron and Tibshirani, An Introduction to the Bootstrap,
    # 1993, ch. 13): 200 resamples as counts per row, the same draws for every budget row
    rights = []
    table = []
    for j, b in enumerate(budgets):
        m = _fetched(b, n)
        row: dict[str, Any] = {"budget": b, "fetches": m}
        for name in STRATEGIES:
            row[name] = {m_: round(at_budgets[name][m_][j], 4)
                         for m_ in ("accuracy", "cost_weighted_error")}
        chosen = plan_order[:m]
        # the planner's accuracy with its spread: rows resampled (Efron and Tibshirani,
        # An Introduction to the Bootstrap, 1993, ch. 13), lookup weights kept
        right = correct_u.copy()
        right[chosen] = correct_f[chosen]
        rights.append(right)
        fail, nbytes, secs = per_row[chosen].sum(axis=0) if m else (0.0, 0.0, 0.0)
        row["operations"] = {
            "fetches": m, "bytes": round(float(nbytes)),
            "fetch_seconds": round(float(secs), 1),
            "wall_seconds": round(float(secs) / max(1, concurrency), 1),
            "expected_failures": round(float(fail), 1),
            "failure_rate": round(float(fail) / m, 4) if m else None}
        table.append(row)
    draws = np.empty((200, len(table)))
    # one resample at a time: memory stays a few vectors of n
    for r, counts_r in enumerate(M.bootstrap_weights(n, 200, seed=0)):
        dw = counts_r * w
        draws[r] = [(dw @ right) / dw.sum() for right in rights]
    for j, row in enumerate(table):
        row["planner"]["accuracy_95"] = [round(float(np.percentile(draws[:, j], 2.5)), 4),
                                         round(float(np.percentile(draws[:, j], 97.5)), 4)]
    planner_curve = np.asarray(curves["planner"]["accuracy"])
    # the knee: the budget farthest above the straight line from fetching nothing to
    # fetching everything (the "kneedle" rule of Satopaa et al., 2011)
    chord = planner_curve[0] + (planner_curve[-1] - planner_curve[0]) * fine
    knee = float(fine[int(np.argmax(planner_curve - chord))])
    conf = pu.max(axis=1)
    m_op_rows = _fetched(operating_budget, n)
    suggested = float(np.sort(conf)[m_op_rows]) if 0 < m_op_rows < n else None
    all_fetch = curves["planner"]["accuracy"][-1]
    gain_all = all_fetch - curves["planner"]["accuracy"][0]
    shares = {name: {f"{int(q * 100)}%": budget_for_share(fine, curves[name]["accuracy"], q,
                                                          gain_all)
                     for q in (0.90, 0.95)} for name in STRATEGIES}
    orders = strategy_orders(y, pu, pf, gain, w, c)
    m_op = _fetched(operating_budget, n)
    at_op = _mixed(pu, pf, orders["planner"], m_op)
    # stable keys (no spaces, independent of the budget); ``VIEW_LABELS`` names them
    views = {"url_only": pu, "planner_at_operating_budget": at_op, "fetch_all": pf}
    coverage = {}
    for name, p in views.items():
        cov, thr = M.coverage_at_precision(y, p, precision_target, sample_weight=w)
        coverage[name] = {"coverage": round(cov, 4),
                          "threshold": None if math.isinf(thr) else round(thr, 4)}
    risk = {}
    for name, p in views.items():
        cov, r = M.risk_coverage_curve(y, p, sample_weight=w)
        step = max(1, len(cov) // 200)
        risk[name] = {"coverage": np.round(cov[::step], 4).tolist() + [1.0],
                      "risk": np.round(r[::step], 4).tolist() + [round(float(r[-1]), 4)]}
    tpr = {name: M.tpr_at_fpr(y, p, ROC_FPR, sample_weight=w)
           for name, p in (("url_only", pu), ("cascade", at_op))}
    auc = M.roc_auc_one_vs_rest(y, at_op, sample_weight=w)
    per_class = []
    f1_url = M.f1_per_class(y, pu.argmax(axis=1), k, w)
    f1_cas = M.f1_per_class(y, at_op.argmax(axis=1), k, w)
    for j, cls in enumerate(classes):
        negatives = int((y != j).sum())
        measurable = negatives >= round(1 / ROC_FPR)  # common practice, no source
        change = None if (math.isnan(f1_url[j]) or math.isnan(f1_cas[j])) else \
            round(float(f1_cas[j] - f1_url[j]), 4)
        per_class.append({
            "category": cls, "rows": int((y == j).sum()), "cost": float(c[j]),
            "risk": (risk_levels or {}).get(cls, "low"),
            f"tpr_at_fpr_{ROC_FPR:g}_url": _num(tpr["url_only"][j]) if measurable else None,
            f"tpr_at_fpr_{ROC_FPR:g}_cascade": _num(tpr["cascade"][j]) if measurable
            else None,
            "tpr_measurable": measurable, "negatives": negatives,
            "f1_url": _num(f1_url[j]), "f1_cascade": _num(f1_cas[j]), "f1_change": change,
            "worse_after_fetching": change is not None and change < -0.02,
            "auc_cascade": _num(auc[j])})
    reliability = {name: M.reliability_table(y, p, 15, sample_weight=w).to_rows()
                   for name, p in (("url_only", pu), ("cascade", at_op))}
    ece = {name: round(M.expected_calibration_error(y, p, 15, sample_weight=w), 4)
           for name, p in views.items()}
    # the same 95% bootstrap for coverage and ECE (100 resamples: each sorts the rows)
    spread: dict[str, dict[str, list[float]]] = {name: {"coverage": [], "ece": []}
                                                 for name in views}
    for counts_r in M.bootstrap_weights(n, 100, seed=1):
        dw = counts_r * w
        for name, p in views.items():
            spread[name]["coverage"].append(
                M.coverage_at_precision(y, p, precision_target, sample_weight=dw)[0])
            spread[name]["ece"].append(M.expected_calibration_error(y, p, 15,
                                                                    sample_weight=dw))
    ece_95 = {}
    for name in views:
        lo_hi = {k: [round(float(np.percentile(v, 2.5)), 4),
                     round(float(np.percentile(v, 97.5)), 4)]
                 for k, v in spread[name].items()}
        coverage[name]["coverage_95"] = lo_hi["coverage"]
        ece_95[name] = lo_hi["ece"]
    return {
        "report": "cascade-budget", "cascade_version": __version__, "title": title,
        "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "rows": int(n), "classes": list(classes), "weighted_by_lookups": counts is not None,
        "lookups": float(w.sum()), "context": context or {},
        "operating_budget": operating_budget, "precision_target": precision_target,
        "knee_budget": knee, "suggested_fetch_below": suggested,  # unrounded: a rounded
        # threshold can fetch a very different share where confidences crowd near 1
        "fetch_costs": {"from_history": costs_given, "concurrency": concurrency,
                        "note": "Bytes, seconds and failures are measured per domain, from "
                        "earlier fetch results" if costs_given else "No fetch history given: "
                        "every fetch is assumed "
                        f"to cost {fetch_costs.default_bytes:,.0f} bytes and "
                        f"{fetch_costs.default_seconds:g} s and to succeed "
                        "(pass --fetch-history for measured figures)"},
        "unit_costs": bool(np.all(c == c[0])),
        "by_risk": None if risk_levels is None else {
            name: risk_breakdown(y, p.argmax(axis=1), list(classes), risk_levels)
            for name, p in (("url_only", pu), ("cascade", at_op))},
        "random_seeds": seeds, "budget_table": table,
        "budget_for_gain_share": shares,
        "gain_of_fetching_all": {"accuracy": round(gain_all, 4)},
        "coverage_at_precision": coverage, "ece_15": ece, "ece_15_95": ece_95,
        "per_class": per_class,
        "curves": {"budget": fine.tolist(), **curves},
        "risk_coverage": risk, "reliability": reliability,
        "roc": _roc_points(y, {"url_only": pu, "cascade": at_op}, classes, w),
    }


def _num(x: Any) -> float | None:
    x = float(x)
    return None if math.isnan(x) else round(x, 4)


def _roc_points(y: np.ndarray, views: dict[str, np.ndarray], classes: Sequence[str],
                weight: np.ndarray) -> dict[str, Any]:
    """Per class, one-vs-rest ROC points weighted by lookups, as the TPR table is
    (reference implementation: sklearn.metrics.roc_curve)."""
    from sklearn.metrics import roc_curve

    out: dict[str, Any] = {}
    for name, p in views.items():
        per = {}
        for j, cls in enumerate(classes):
            pos = y == j
            if pos.all() or not pos.any():
                continue
            fpr, tpr, _ = roc_curve(pos, p[:, j], sample_weight=weight,
                                    drop_intermediate=True)
            step = max(1, len(fpr) // 300)
            keep = np.unique(np.append(np.arange(0, len(fpr), step), len(fpr) - 1))
            per[cls] = {"fpr": np.round(fpr[keep], 6).tolist(),
                        "tpr": np.round(tpr[keep], 6).tolist()}
        out[name] = per
    return out


# ------------------------------------------------------------------------ drawing

_COLOURS = {"planner": "#1b6b5a", "lowest-confidence": "#c2711b", "random": "#7a7a7a",
            "oracle": "#3b4cc0", "url_only": "#c2711b", "cascade": "#1b6b5a",
            "planner_at_operating_budget": "#1b6b5a", "fetch_all": "#3b4cc0"}

#: What the report shows for each stable key of ``report.json``.
VIEW_LABELS = {"url_only": "URL model only", "planner_at_operating_budget":
               "planner at the operating budget", "fetch_all": "fetch all",
               "cascade": "cascade (planner at the operating budget)"}


def _label(rep: dict[str, Any], name: str) -> str:
    if name == "planner_at_operating_budget":
        return f"planner at {rep['operating_budget']:.0%}"
    return VIEW_LABELS.get(name, name)


#: The report's plot style, applied only while its own figures are built and saved.
_STYLE = {"font.size": 9, "axes.spines.top": False, "axes.spines.right": False}


def _figures(rep: dict[str, Any]) -> list[tuple[str, str, str]]:
    """(id, caption, base64 PNG) per plot.

    Draws on its own ``Figure`` objects (no pyplot, no backend switch) with the style in
    an ``rc_context``, so a program that builds a report keeps its matplotlib settings."""
    import matplotlib

    with matplotlib.rc_context(_STYLE):
        return _draw(rep)


def _draw(rep: dict[str, Any]) -> list[tuple[str, str, str]]:
    from matplotlib.figure import Figure

    figs: list[tuple[str, str, str]] = []

    def keep(fig: Figure, fid: str, caption: str) -> None:
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
        figs.append((fid, caption, base64.b64encode(buf.getvalue()).decode("ascii")))

    x = np.array(rep["curves"]["budget"]) * 100
    metrics = [("accuracy", "accuracy", "budget-accuracy")]
    if not rep.get("unit_costs", False):  # with unit costs it is 1 - accuracy again
        metrics.append(("cost_weighted_error", "cost-weighted error", "budget-error"))
    for metric, label, fid in metrics:
        fig = Figure(figsize=(6.2, 3.6))
        ax = fig.subplots()
        for name in STRATEGIES:
            cur = rep["curves"][name]
            ax.plot(x, cur[metric], label=name, color=_COLOURS[name],
                    lw=2.2 if name == "planner" else 1.4,
                    ls="--" if name == "oracle" else "-")
            if name == "random" and metric == "accuracy":
                ax.fill_between(x, cur["accuracy_min"], cur["accuracy_max"],
                                color=_COLOURS[name], alpha=0.15, lw=0)
        for at, what, style in ((rep["operating_budget"], "operating budget", "-"),
                                (rep.get("knee_budget"), "knee", ":")):
            if at is not None:
                ax.axvline(at * 100, color="#444", lw=0.9, ls=style, label=what)
        ax.set_xlabel("fetch budget (% of URLs fetched)")
        ax.set_ylabel(label)
        ax.grid(alpha=0.3)
        ax.legend(frameon=False, fontsize=8)
        keep(fig, fid, f"{label.capitalize()} against fetch budget, four strategies.")
    fig = Figure(figsize=(6.2, 3.6))
    ax = fig.subplots()
    for name, cur in rep["risk_coverage"].items():
        ax.plot(cur["coverage"], cur["risk"], label=_label(rep, name),
                color=_COLOURS.get(name.split(" at ")[0], "#1b6b5a"))
    ax.set_xlabel("coverage (share of lookups answered)")
    ax.set_ylabel("risk (error among answered)")
    ax.grid(alpha=0.3)
    ax.legend(frameon=False, fontsize=8)
    keep(fig, "risk-coverage", "Risk against coverage, answering the most confident first.")
    classes = [c for c in rep["classes"] if c in rep["roc"].get("cascade", {})]
    cols = 4
    rows = max(1, math.ceil(len(classes) / cols))
    fig = Figure(figsize=(8.8, 2.3 * rows + 0.8), layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False, sharex=True, sharey=True)
    for ax in axes.flat[len(classes):]:
        ax.axis("off")
    for ax, cls in zip(axes.flat, classes, strict=False):
        for name in ("url_only", "cascade"):
            pts = rep["roc"][name].get(cls)
            if pts:
                ax.plot(np.maximum(pts["fpr"], 1e-5), pts["tpr"], color=_COLOURS[name],
                        lw=1.2, label=_label(rep, name))
        ax.axvline(ROC_FPR, color="#b22222", lw=0.8, ls=":")
        ax.set_xscale("log")
        ax.set_xlim(1e-5, 1)
        ax.set_ylim(0, 1.02)
        ax.set_xticks([1e-4, 1e-2, 1])
        ax.set_title(cls, fontsize=8, parse_math=False)  # a '$' in a name is not TeX
        ax.tick_params(labelsize=7)
    fig.supxlabel("false-positive rate (log scale)", fontsize=8)
    fig.supylabel("true-positive rate", fontsize=8)
    handles, labels = axes.flat[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper center", ncols=2, frameon=False, fontsize=8)
    keep(fig, "roc", f"Per-category ROC (one vs rest, log FPR); dotted line at FPR {ROC_FPR:g}.")
    fig = Figure(figsize=(4.4, 4.0))
    ax = fig.subplots()
    ax.plot([0, 1], [0, 1], color="#999999", lw=0.8, ls=":")
    for name, rows_ in rep["reliability"].items():
        pts = [(r["mean_confidence"], r["accuracy"], r["count"]) for r in rows_
               if r["accuracy"] is not None]
        if pts:
            xs, ys, ns = zip(*pts, strict=True)
            ax.plot(xs, ys, marker="o", ms=3, label=_label(rep, name), color=_COLOURS[name])
            if name == "cascade":  # how many rows stand behind each point
                for x_, y_, n_ in zip(xs, ys, ns, strict=True):
                    ax.annotate(str(n_), (x_, y_), textcoords="offset points",
                                xytext=(0, 5), ha="center", fontsize=6, color="#444")
    ax.set_xlabel("mean confidence in bin")
    ax.set_ylabel("accuracy in bin")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.legend(frameon=False, fontsize=8)
    keep(fig, "reliability", "Reliability: accuracy against confidence, 15 equal bins "
                              "(numbers: rows in each bin of the cascade's verdicts).")
    return figs


_CSS = """
body{font-family:Georgia,'DejaVu Serif',serif;max-width:60rem;margin:2rem auto;padding:0 1rem;
color:#222;background:#fbfaf7;line-height:1.45}
h1{font-size:1.6rem;border-bottom:3px solid #1b6b5a;padding-bottom:.3rem}
h2{font-size:1.15rem;margin-top:2rem;color:#1b6b5a}
table{border-collapse:collapse;font-family:'DejaVu Sans Mono',monospace;font-size:.8rem}
td,th{padding:.2rem .6rem;border-bottom:1px solid #ddd;text-align:right}
th{background:#eef3f1}
td:first-child,th:first-child{text-align:left}
.best{font-weight:bold;color:#1b6b5a}
figure{margin:1rem 0;background:#fff;padding:.5rem;border:1px solid #e4e1da;text-align:center}
figcaption{font-size:.85rem;color:#555}
img{max-width:100%}
.note{font-size:.85rem;color:#555;border-left:3px solid #c2711b;padding-left:.6rem}
tr.worse td{background:#fbe9e7}
"""


def _html(rep: dict[str, Any], figs: list[tuple[str, str, str]]) -> str:
    e = html.escape
    volume = (f", weighted by {int(rep['lookups']):,} lookups"
              if rep["weighted_by_lookups"] else "")
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
             f"<title>{e(rep['title'])}</title><style>{_CSS}</style></head><body>",
             f"<h1>{e(rep['title'])}</h1>",
             f"<p>{rep['rows']} labelled URLs, {len(rep['classes'])} categories"
             f"{volume}."
             f" Written {e(rep['created_at'])} by cascade {e(rep['cascade_version'])}.</p>"]
    if rep["context"]:
        parts.append("<table>" + "".join(f"<tr><td>{e(str(a))}</td><td>{e(str(b))}</td></tr>"
                                         for a, b in rep["context"].items()) + "</table>")
    cost_col = not rep.get("unit_costs", False)  # with unit costs it repeats 1 - accuracy
    parts.append("<h2>What each fetch budget buys</h2><table><tr><th>budget</th>"
                 + "".join(f"<th>{e(s)}</th>" for s in STRATEGIES)
                 + ("<th>planner cost-weighted error</th>" if cost_col else "")
                 + "<th>fetches</th><th>MB</th><th>fetch-seconds</th>"
                 + f"<th>wall-clock s at {rep['fetch_costs']['concurrency']} in flight</th>"
                 + "<th>expected failures</th></tr>")
    near_op = min(rep["budget_table"], key=lambda r: abs(r["budget"] - rep["operating_budget"]))
    near_knee = min(rep["budget_table"], key=lambda r: abs(r["budget"] - rep["knee_budget"]))
    for row in rep["budget_table"]:
        best = max(row[s]["accuracy"] for s in STRATEGIES if s != "oracle")
        lo, hi = row["planner"].get("accuracy_95", (None, None))
        spread = "" if lo is None else f" <small>[{lo:.3f}, {hi:.3f}]</small>"
        cells = "".join(
            f"<td class=\"{'best' if s != 'oracle' and row[s]['accuracy'] == best else ''}\">"
            f"{row[s]['accuracy']:.4f}{spread if s == 'planner' else ''}</td>"
            for s in STRATEGIES)
        ops = row["operations"]
        marks = [m for m, r in (("operating budget", near_op), ("knee", near_knee))
                 if r is row]
        label = f"{row['budget']:.0%}" + (f" <b>({', '.join(marks)})</b>" if marks else "")
        parts.append(f"<tr><td>{label}</td>{cells}"
                     + (f"<td>{row['planner']['cost_weighted_error']:.4f}</td>"
                        if cost_col else "")
                     + f"<td>{ops['fetches']:,}</td><td>{ops['bytes'] / 1e6:,.1f}</td>"
                       f"<td>{ops['fetch_seconds']:,.0f}</td><td>{ops['wall_seconds']:,.1f}"
                       f"</td><td>{ops['expected_failures']:,.0f}</td></tr>")
    suggestion = rep.get("suggested_fetch_below")
    parts.append("</table><p>Accuracy when that share of the URLs is fetched (planner: with "
                 "its 95% bootstrap interval); the rest keep the URL model's verdict. The "
                 "oracle fetches only URLs a fetch fixes. "
                 f"{e(rep['fetch_costs']['note'])}. The knee (the budget farthest above the "
                 f"straight line from nothing to everything) is at {rep['knee_budget']:.0%}."
                 + ("" if suggestion is None else
                    f" To fetch about {rep['operating_budget']:.0%} of URLs by confidence "
                    f"alone, use <code>--fetch-below {suggestion:.6g}</code> (report.json holds "
                    "it unrounded).") + "</p>")
    parts.append("<h2>Budget needed for a share of the gain of fetching everything</h2>"
                 "<table><tr><th>strategy</th><th>90% of gain</th><th>95% of gain</th></tr>")
    for s in STRATEGIES:
        v = rep["budget_for_gain_share"][s]
        parts.append(f"<tr><td>{e(s)}</td>" + "".join(
            f"<td>{'-' if v[q] is None else format(v[q], '.0%')}</td>" for q in ("90%", "95%"))
            + "</tr>")
    parts.append(f"</table><p>Fetching everything gains "
                 f"{rep['gain_of_fetching_all']['accuracy']:+.4f} accuracy.</p>")
    unit = "lookups" if rep["weighted_by_lookups"] else "URLs"
    parts.append(f"<h2>Coverage at precision {rep['precision_target']:.0%}</h2><table><tr>"
                 f"<th>verdicts</th><th>coverage of {unit}</th><th>confidence threshold</th>"
                 "<th>ECE (15 bins)</th></tr>")
    def band(values: list[float] | None) -> str:
        return "" if not values else f" <small>[{values[0]:.3f}, {values[1]:.3f}]</small>"

    for name, v in rep["coverage_at_precision"].items():
        thr = "-" if v["threshold"] is None else f"{v['threshold']:.4f}"
        parts.append(f"<tr><td>{e(_label(rep, name))}</td><td>{v['coverage']:.4f}"
                     f"{band(v.get('coverage_95'))}</td><td>{thr}</td>"
                     f"<td>{rep['ece_15'][name]:.4f}"
                     f"{band(rep.get('ece_15_95', {}).get(name))}</td></tr>")
    parts.append("</table>")
    tkey = f"tpr_at_fpr_{ROC_FPR:g}"
    parts.append(f"<h2>Per category</h2><table><tr><th>category</th><th>risk</th><th>rows</th>"
                 f"<th>cost</th><th>F1, URL</th><th>F1, cascade</th><th>change</th>"
                 f"<th>TPR at FPR {ROC_FPR:g}, URL</th><th>same, cascade</th>"
                 "<th>AUC, cascade</th></tr>")
    for r in rep["per_class"]:
        def f(v: float | None) -> str:
            return "-" if v is None else f"{v:.3f}"
        if r.get("tpr_measurable", True):
            tprs = f"<td>{f(r[tkey + '_url'])}</td><td>{f(r[tkey + '_cascade'])}</td>"
        else:
            tprs = (f"<td colspan=\"2\">not measurable: {r['negatives']} negatives "
                    f"(needs {round(1 / ROC_FPR):,})</td>")
        change = r.get("f1_change")
        flag = " class=\"worse\"" if r.get("worse_after_fetching") else ""
        parts.append(f"<tr{flag}><td>{e(r['category'])}</td><td>{e(r.get('risk', ''))}</td>"
                     f"<td>{r['rows']}</td><td>{r['cost']:g}</td>"
                     f"<td>{f(r.get('f1_url'))}</td><td>{f(r.get('f1_cascade'))}</td>"
                     f"<td>{'-' if change is None else format(change, '+.3f')}"
                     f"{' (worse)' if r.get('worse_after_fetching') else ''}</td>"
                     f"{tprs}<td>{f(r['auc_cascade'])}</td></tr>")
    parts.append("</table><p>Fetching raises the average and can still hurt one category: "
                 "rows marked worse lose more than 0.02 F1 from the URL model alone to the "
                 "cascade at the operating budget.</p>")
    if rep.get("by_risk") and next(iter(rep["by_risk"].values()))["high_risk_categories"]:
        parts.append("<h2>High-risk categories</h2><table><tr><th>verdicts</th>"
                     "<th>under-blocking (high-risk rows put in a low-risk category)</th>"
                     "<th>over-blocking (low-risk rows put in a high-risk category)</th></tr>")
        for name, b in rep["by_risk"].items():
            u, o = b["under_blocking"], b["over_blocking"]
            us = "-" if u["share_of_high_risk_rows"] is None else \
                f"{u['rows']} ({u['share_of_high_risk_rows']:.1%})"
            os_ = "-" if o["share_of_low_risk_rows"] is None else \
                f"{o['rows']} ({o['share_of_low_risk_rows']:.1%})"
            parts.append(f"<tr><td>{e(_label(rep, name))}</td><td>{us}</td><td>{os_}</td>"
                         "</tr>")
        cats = ", ".join(next(iter(rep["by_risk"].values()))["high_risk_categories"]) or "none"
        parts.append(f"</table><p>High-risk categories (the taxonomy's <code>risk</code>): "
                     f"{e(cats)}.</p>")
    parts.append("<h2>Plots</h2>")
    for fid, caption, data in figs:
        parts.append(f"<figure id=\"{fid}\"><img alt=\"{e(caption)}\" "
                     f"src=\"data:image/png;base64,{data}\"><figcaption>{e(caption)}"
                     "</figcaption></figure>")
    parts.append("<p class=\"note\">Categories are probabilistic estimates. Whether to block, "
                 "warn or allow is the policy owner's decision, under local law and the "
                 "organisation's policy; lookup logs are personal data.</p></body></html>\n")
    return "".join(parts)


def write_report(rep: dict[str, Any], out_dir: str | Path) -> dict[str, Path]:
    """Write ``report.json``, ``report.html`` (plots embedded) and one PNG per plot."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    figs = _figures(rep)
    paths = {"json": out / "report.json", "html": out / "report.html"}
    paths["json"].write_text(json.dumps(rep, indent=1) + "\n", encoding="utf-8")
    paths["html"].write_text(_html(rep, figs), encoding="utf-8")
    for fid, _caption, data in figs:
        (out / f"{fid}.png").write_bytes(base64.b64decode(data))
        paths[fid] = out / f"{fid}.png"
    return paths
