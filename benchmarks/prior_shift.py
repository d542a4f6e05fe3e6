"""Prior-shift re-estimation (``cascade.prior_shift``, EM of Saerens, Latinne and Decaestecker
2002) on the URL model: does adjusting to a batch's estimated class mix make the
probabilities more honest?

    python benchmarks/prior_shift.py --json docs/measurements/prior_shift.json

WebKB (``../shared/data/university-pages``), leave-one-university-out as in
``benchmarks/page_model.py`` (cornell, washington, wisconsin held out in turn; misc always
trains); a ``UrlModel()`` with default settings is fitted on the other universities' URLs.
On the held-out university (its own class mix, and its own URL habits), before and after:
accuracy, mean confidence, ECE (15 bins), log loss; the true mix against the estimate and
the training priors. The EM runs with two sources of training priors:

- ``counts``: the training class counts (``model.training_["class_counts"]``), what the
  nightly job and ``cascade report --prior-shift`` use (a loaded model has only these);
- ``implied``: the mean of the model's out-of-fold calibrated probabilities on its own
  training rows (what the model, calibration included, says the training mix is; only a
  model fitted in the same process has them).

``bayes_true_mix`` adjusts with the true mix of the batch (known here, not in use): the most
a prior correction alone could do. ``label_shift_only`` resamples the training rows'
out-of-fold probabilities to the held-out university's mix (same classes, same look, only
the mix moved), which is the case the method is made for.

Each is measured twice: on the model's probabilities (``temperature_only``, what cascade
ships) and on ``bias_corrected`` ones (a temperature and one bias per class fitted by log
loss on the out-of-fold logits, here in the benchmark only), since EM trusts every class's
probability, not only the top one's.

The demo scenario (its time split: later URLs, new domains) is measured the same way.
Prints one JSON object.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
from scipy.optimize import minimize
from sklearn.metrics import log_loss

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import SHARED_DATA, load_webkb_rows, machine, write_json  # noqa: E402

from cascade.metrics import expected_calibration_error  # noqa: E402
from cascade.models.calibration import softmax  # noqa: E402
from cascade.models.url_model import UrlModel  # noqa: E402
from cascade.prior_shift import PriorShift, adjust_posteriors, training_priors  # noqa: E402
from cascade.urls import normalize  # noqa: E402


def _scores(y: np.ndarray, proba: np.ndarray) -> dict:
    k = proba.shape[1]
    return {"accuracy": round(float((proba.argmax(1) == y).mean()), 4),
            "mean_confidence": round(float(proba.max(1).mean()), 4),
            "ece_15": round(float(expected_calibration_error(y, proba, 15)), 4),
            # reference implementation: sklearn.metrics.log_loss
            "log_loss": round(float(log_loss(y, np.clip(proba, 1e-15, 1), labels=range(k))),
                              4)}


def _mix(values: np.ndarray, classes: list[str]) -> dict:
    return {c: round(float(v), 4) for c, v in zip(classes, values, strict=True)}


def _l1(a: np.ndarray, b: np.ndarray) -> float:
    return round(float(np.abs(a - b).sum()), 4)


def _em(y: np.ndarray, proba: np.ndarray, train: np.ndarray, classes: list[str]) -> dict:
    true = np.bincount(y, minlength=len(classes)) / len(y)
    shift = PriorShift().fit(proba, train)
    return {"after": _scores(y, shift.transform(proba)),
            "estimated_priors": _mix(shift.priors_, classes),
            "l1_estimate_to_true_mix": _l1(shift.priors_, true),
            "l1_training_to_true_mix": _l1(shift.train_priors_, true),
            "iterations": shift.n_iter_, "converged": bool(shift.converged_)}


def _fit_bias_correction(logits: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Temperature and one bias per class, fitted by log loss on held-out logits
    (``softmax(logits / T + b)``): calibration with class-wise biases, which the URL model
    does not have (it fits a temperature only)."""
    k = logits.shape[1]

    def nll(theta: np.ndarray) -> tuple[float, np.ndarray]:
        z = logits / np.exp(theta[0]) + theta[1:]
        p = softmax(z)
        d = p.copy()
        d[np.arange(len(y)), y] -= 1.0
        d /= len(y)
        grad_t = -float((d * (logits / np.exp(theta[0]))).sum())
        lse = np.log(np.exp(z - z.max(1, keepdims=True)).sum(1)) + z.max(1)
        return float(np.mean(lse - z[np.arange(len(y)), y])), np.concatenate(
            [[grad_t], d.sum(0)])

    return minimize(nll, np.zeros(k + 1), jac=True, method="L-BFGS-B").x


def _bias_corrected(logits: np.ndarray, theta: np.ndarray) -> np.ndarray:
    return softmax(logits / np.exp(theta[0]) + theta[1:])


def _measure(y: np.ndarray, proba: np.ndarray, proba_bias: np.ndarray,
             priors: dict[str, np.ndarray], classes: list[str]) -> dict:
    """Before and after, for the model's probabilities (temperature only) with each source of
    training priors, and for the bias-corrected ones (whose mean on the training rows is the
    training mix, so counts and implied priors agree)."""
    true = np.bincount(y, minlength=len(classes)) / len(y)
    floor = np.maximum(true, 1e-6)
    return {
        "rows": int(len(y)), "true_mix": _mix(true, classes),
        "training_priors": {name: _mix(p, classes) for name, p in priors.items()},
        "temperature_only": {
            "before": _scores(y, proba),
            **{f"em_{name}": _em(y, proba, p, classes) for name, p in priors.items()},
            "bayes_true_mix": _scores(y, adjust_posteriors(proba, priors["counts"], floor))},
        "bias_corrected": {
            "before": _scores(y, proba_bias),
            "em_counts": _em(y, proba_bias, priors["counts"], classes),
            "bayes_true_mix": _scores(y, adjust_posteriors(proba_bias, priors["counts"],
                                                           floor))},
    }


def _resampled(y: np.ndarray, target: np.ndarray, n: int, seed: int) -> np.ndarray:
    """Indices of ``n`` rows drawn (with replacement) so that the class mix is ``target``."""
    rng = np.random.default_rng(seed)
    counts = np.floor(target * n).astype(int)
    counts[np.argmax(target)] += n - counts.sum()
    rows = [rng.choice(np.flatnonzero(y == c), size=m, replace=True)
            for c, m in enumerate(counts) if m and (y == c).any()]
    return np.concatenate(rows)


def _one_split(train_urls, train_labels, test_urls, test_labels, seed: int,
               resample_rows: int) -> dict:
    started = time.perf_counter()
    model = UrlModel(seed=seed).fit(train_urls, train_labels)
    fit_s = time.perf_counter() - started
    classes = list(model.classes_)
    y_test = np.array([classes.index(v) for v in test_labels])
    proba = model.predict_proba(test_urls)
    test_logits = model.decision_function(test_urls) * model.temperature_  # before scaling
    oof = model.oof_logits_.astype(np.float64)
    seen = ~np.isnan(oof[:, 0])
    oof_logits = oof[seen]
    oof_proba = model.proba_from_logits(oof_logits)
    y_oof = np.array([classes.index(v) for v in train_labels])[seen]
    theta = _fit_bias_correction(oof_logits, y_oof)
    priors = {"counts": training_priors(model), "implied": oof_proba.mean(axis=0)}
    out = {"train_rows": len(train_urls), "fit_seconds": round(fit_s, 1),
           "held_out": _measure(y_test, proba, _bias_corrected(test_logits, theta), priors,
                                classes)}
    # the same shift of the mix without any other change: out-of-fold rows of the training
    # universities, drawn to the held-out university's mix (bias correction fitted on these
    # rows: 8 parameters on thousands of rows)
    true = np.bincount(y_test, minlength=len(classes)) / len(y_test)
    idx = _resampled(y_oof, true, resample_rows, seed)
    own = np.bincount(y_oof, minlength=len(classes)) / len(y_oof)
    out["label_shift_only"] = _measure(y_oof[idx], oof_proba[idx],
                                       _bias_corrected(oof_logits[idx], theta),
                                       {"counts": own, "implied": priors["implied"]}, classes)
    return out


def _short(res: dict) -> dict:
    """The headline figures of one split, for stderr."""
    return {part: {"before": res[part]["temperature_only"]["before"]["accuracy"],
                   "em_counts": res[part]["temperature_only"]["em_counts"]["after"]["accuracy"],
                   "bias_corrected_em": res[part]["bias_corrected"]["em_counts"]["after"][
                       "accuracy"]}
            for part in ("held_out", "label_shift_only")}


def webkb(seed: int, resample_rows: int) -> dict:
    loaded = load_webkb_rows()
    if loaded is None:
        return {"skipped": f"{SHARED_DATA / 'university-pages' / 'pages.jsonl.gz'} not found"}
    rows, skipped = loaded
    out: dict = {"rows": len(rows), "rows_with_unusable_url": skipped, "held_out": {}}
    for held in ("cornell", "washington", "wisconsin"):
        tr = [r for r in rows if r["university"] != held]
        te = [r for r in rows if r["university"] == held]
        res = _one_split([r["url"] for r in tr], [r["label"] for r in tr],
                         [r["url"] for r in te], [r["label"] for r in te], seed,
                         resample_rows)
        out["held_out"][held] = res
        print(f"webkb {held}: {json.dumps(_short(res))}", file=sys.stderr, flush=True)
    return out


def demo(seed: int, resample_rows: int) -> dict:
    from cascade.evaluate import evaluation_split
    from cascade.scenario import generate_telemetry

    records = generate_telemetry(seed=seed, n_sites=2000)
    keys = [normalize(r.url) for r in records]
    split = evaluation_split(keys, [r.seen_at for r in records], test_fraction=0.25, seed=seed)
    res = _one_split([keys[i] for i in split.train], [records[i].label for i in split.train],
                     [keys[i] for i in split.test], [records[i].label for i in split.test],
                     seed, resample_rows)
    print(f"demo: {json.dumps(_short(res))}", file=sys.stderr, flush=True)
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--json", help="also write the JSON object here")
    ap.add_argument("--datasets", default="webkb,demo")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--resample-rows", type=int, default=2000,
                    help="rows of each label-shift-only batch (default 2000)")
    ap.add_argument("--note", help="free text kept in the output (e.g. which code was measured)")
    args = ap.parse_args()
    wanted = set(args.datasets.split(","))
    started = time.perf_counter()
    result: dict = {"benchmark": "prior_shift", "machine": machine(),
                    "inputs": {"seed": args.seed, "resample_rows": args.resample_rows,
                               "prior_shift": PriorShift().get_params(),
                               "url_model": UrlModel().get_params()}}
    if "webkb" in wanted:
        result["webkb"] = webkb(args.seed, args.resample_rows)
    if "demo" in wanted:
        result["demo"] = demo(args.seed, args.resample_rows)
    if args.note:
        result["note"] = args.note
    result["seconds"] = round(time.perf_counter() - started, 1)
    write_json(result, args.json)


if __name__ == "__main__":
    main()
