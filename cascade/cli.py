"""The ``cascade`` command.

Exit codes (also in ``cascade --help``):
  0  done, every input line used
  1  unexpected internal error (a bug: please report it with the traceback)
  2  usage error (bad options)
  3  done, but some input lines were bad and skipped (counted, samples in the summary)
  4  a file could not be used (model directory, taxonomy, input file)
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from cascade import __version__
from cascade.errors import CascadeError, InvalidURL
from cascade.io import InputRecord, Progress, ReadStats, open_writer, read_records
from cascade.taxonomy import Taxonomy, demo_taxonomy, load_taxonomy
from cascade.urls import UrlKey, normalize

EXIT_OK, EXIT_BUG, EXIT_USAGE, EXIT_PARTIAL, EXIT_FILE = 0, 1, 2, 3, 4
CHUNK = 4096

EPILOG = """exit codes: 0 done; 1 internal error; 2 usage error; 3 done but some input lines were
skipped (see the summary on stderr); 4 a model, taxonomy or input file could not be used.

Categories are probabilities, not facts. Lookup logs are personal data: handle them under
your organisation's policy and local law. The policy owner decides what to block."""


# ---------------------------------------------------------------------------- helpers
def _eprint(*args: Any) -> None:
    print(*args, file=sys.stderr, flush=True)


def _summary(stats: ReadStats, **extra: Any) -> dict[str, Any]:
    out = {"input": stats.to_dict(), **extra}
    return out


def _finish(summary: dict[str, Any], stats: ReadStats, quiet: bool = False) -> int:
    if not quiet:
        _eprint(json.dumps(summary, ensure_ascii=False))
    return EXIT_PARTIAL if stats.bad else EXIT_OK


def _keyed_records(
    records: Iterator[InputRecord], stats: ReadStats
) -> Iterator[tuple[InputRecord, UrlKey]]:
    """Normalize each record's URL; a bad URL is counted as a bad line and skipped."""
    for rec in records:
        try:
            yield rec, normalize(rec.url)
        except InvalidURL as exc:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, f"invalid URL: {exc.reason}")


def _chunks(items: Iterator[Any], size: int = CHUNK) -> Iterator[list[Any]]:
    chunk: list[Any] = []
    for item in items:
        chunk.append(item)
        if len(chunk) >= size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def _input_records(args: argparse.Namespace, stats: ReadStats) -> Iterator[InputRecord]:
    if getattr(args, "urls", None):
        for i, u in enumerate(args.urls, 1):
            stats.lines += 1
            stats.records += 1
            yield InputRecord(line_no=i, url=u)
        return
    source = args.input or "-"
    yield from read_records(source, fmt=args.input_format, stats=stats)


def _load_taxonomy(path: str | None) -> Taxonomy | None:
    if path is None:
        return None
    if path == "demo":
        return demo_taxonomy()
    return load_taxonomy(path)


def _load_labelled(args: argparse.Namespace, stats: ReadStats,
                   extras: list[dict[str, str]] | None = None) -> tuple[
        list[UrlKey], list[str], list[int], list[str | None]]:
    keys, labels, counts, times = [], [], [], []
    progress = Progress(label="reading", enabled=None if not args.quiet else False)
    for rec, key in _keyed_records(read_records(args.input, fmt=args.input_format, stats=stats),
                                   stats):
        if not rec.label:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, "no label")
            continue
        keys.append(key)
        labels.append(rec.label)
        counts.append(rec.count)
        times.append(rec.seen_at)
        if extras is not None:
            extras.append(rec.extra)
        progress.update()
    progress.close()
    return keys, labels, counts, times


# ---------------------------------------------------------------------------- commands
def cmd_train(args: argparse.Namespace) -> int:
    from cascade.evaluate import evaluate_proba, evaluation_split
    from cascade.models.url_model import UrlModel

    stats = ReadStats()
    extras: list[dict[str, str]] = []
    keys, labels, counts, times = _load_labelled(args, stats, extras)
    if len(keys) < 2:
        raise CascadeError(f"{args.input}: fewer than two usable labelled rows")
    pages = _read_pages(args, extras)
    taxonomy = _load_taxonomy(args.taxonomy)
    params = dict(ngram_range=(args.ngram_min, args.ngram_max), n_features=2**args.hash_bits,
                  use_tokens=not args.no_tokens, C=args.C, max_iter=args.max_iter,
                  seed=args.seed)
    metrics: dict[str, Any] = {}
    if args.holdout > 0:
        split = evaluation_split(keys, times, test_fraction=args.holdout, seed=args.seed,
                                 group_by_domain=not args.no_group)
        _eprint(f"train: holding out {len(split.test)} rows ({split.method}) to measure")
        model = UrlModel(**params).fit([keys[i] for i in split.train],
                                       [labels[i] for i in split.train], taxonomy=taxonomy)
        test_keys = [keys[i] for i in split.test]
        if test_keys:
            metrics = evaluate_proba(model.predict_proba(test_keys),
                                     [labels[i] for i in split.test], model.classes_,
                                     counts=[counts[i] for i in split.test])
            metrics["split"] = split.describe()
            _eprint(f"train: held-out accuracy {metrics['accuracy']:.4f}, macro-F1 "
                    f"{metrics['macro_f1']:.4f}, ECE {metrics['ece_15']:.4f}")
    n_pages = sum(p is not None for p in pages)
    if n_pages:
        from cascade.bundle import fit_bundle

        _eprint(f"train: URL model on {len(keys)} rows, page model and fusion on "
                f"{n_pages} pages (stacked, {args.folds} folds)")
        url_params = {k: v for k, v in params.items() if k != "seed"}
        bundle = fit_bundle(keys, labels, pages, taxonomy=taxonomy, url_params=url_params,
                            folds=args.folds, seed=args.seed,
                            progress=None if args.quiet else lambda m: _eprint(f"train: {m}"))
        bundle.save(args.model, metrics=metrics)
        return _finish(_summary(stats, model=str(args.model), version=bundle.version,
                                classes=len(bundle.classes), pages=n_pages,
                                stacking=bundle.report, metrics_held_out=bool(metrics)),
                       stats, args.quiet)
    _eprint(f"train: fitting on {len(keys)} rows")
    model = UrlModel(**params).fit(keys, labels, taxonomy=taxonomy)
    model.save(args.model, metrics=metrics)
    return _finish(_summary(stats, model=str(args.model), version=model.version,
                            classes=len(model.classes_), temperature=model.temperature_,
                            seconds=model.training_["seconds"], metrics_held_out=bool(metrics)),
                   stats, args.quiet)


def _read_pages(args: argparse.Namespace, extras: list[dict[str, str]],
                who: str = "train") -> list[Any]:
    """Each row's page: a ``page`` column naming a saved HTML file (under ``--pages``, else
    beside the input; ``.gz`` ok) or a ``text`` column of page text; None where neither.
    A page file that cannot be read is reported and the row trains the URL model only."""
    import gzip

    from cascade.extract import extract

    base = Path(args.pages) if args.pages else Path(args.input).parent
    pages: list[Any] = []
    missing = 0
    for extra in extras:
        name, text = extra.get("page"), extra.get("text")
        if name:
            path = base / name
            try:
                raw = path.read_bytes()
                if raw[:2] == b"\x1f\x8b":
                    raw = gzip.decompress(raw)
            except (OSError, EOFError, gzip.BadGzipFile) as exc:
                missing += 1
                if missing <= 5:
                    _eprint(f"{who}: page {path} not used: {exc}")
                pages.append(None)
                continue
            pages.append(extract(raw, content_type="text/html"))
        elif text:
            pages.append(extract(text, content_type="text/plain"))
        else:
            pages.append(None)
    if missing:
        _eprint(f"{who}: {missing} page files could not be read; those rows use the URL "
                "model only")
    return pages


def cmd_score(args: argparse.Namespace) -> int:
    from cascade.models.url_model import UrlModel
    from cascade.verdict import url_verdicts

    model = UrlModel.load(args.model)
    stats = ReadStats()
    progress = Progress(label="scoring", enabled=None if not args.quiet else False)
    written = 0
    with open_writer(args.output, fmt=args.output_format) as out:
        for chunk in _chunks(_keyed_records(_input_records(args, stats), stats)):
            keys = [k for _, k in chunk]
            proba = model.predict_proba(keys)
            for verdict in url_verdicts([k.url for k in keys], proba, model.classes_,
                                        model.version, fetch_below=args.fetch_below,
                                        top_k=args.top):
                row = verdict.to_dict()
                if args.output_format == "csv":
                    row["top"] = json.dumps(row["top"])
                out.write(row)
                written += 1
            progress.update(len(chunk))
    progress.close()
    return _finish(_summary(stats, scored=written, model_version=model.version), stats,
                   args.quiet)


def cmd_explain(args: argparse.Namespace) -> int:
    from cascade.models.url_model import UrlModel

    model = UrlModel.load(args.model)
    if args.page:
        return _explain_page(args)
    bad = 0
    for url in args.urls:
        try:
            exp = model.explain(url, top=args.top, n_classes=args.classes)
        except InvalidURL as exc:
            bad += 1
            _eprint(f"explain: {exc}")
            continue
        if args.json:
            print(json.dumps(exp.to_dict(), ensure_ascii=False))
            continue
        print(exp.url)
        for cls, rest in zip(exp.classes, exp.rest, strict=True):
            print(f"  {cls.category:<14} p={cls.probability:.3f}  logit={cls.logit:+.3f}"
                  f"  (bias {cls.bias:+.3f}, other features {rest:+.3f})")
            for c in cls.contributions:
                print(f"      {c.value:+.3f}  {c.kind:<5} {c.feature}")
    return EXIT_PARTIAL if bad else EXIT_OK


def _print_explanation(exp: Any, title: str) -> None:
    print(title)
    for cls, rest in zip(exp.classes, exp.rest, strict=True):
        print(f"  {cls.category:<14} p={cls.probability:.3f}  logit={cls.logit:+.3f}"
              f"  (bias {cls.bias:+.3f}, other features {rest:+.3f})")
        for c in cls.contributions:
            print(f"      {c.value:+.3f}  {c.kind:<6} {c.feature}")


def _explain_page(args: argparse.Namespace) -> int:
    import gzip

    import numpy as np

    from cascade.bundle import ModelBundle
    from cascade.extract import extract
    from cascade.models.text_features import page_word_count

    if len(args.urls) != 1:
        raise ValueError("--page explains one URL at a time")
    bundle = ModelBundle.load(args.model)
    if bundle.page_model is None or bundle.fusion is None:
        raise CascadeError(f"{args.model}: no page model here (train with pages)")
    try:
        raw = Path(args.page).read_bytes()
        if raw[:2] == b"\x1f\x8b":
            raw = gzip.decompress(raw)
    except (OSError, EOFError, gzip.BadGzipFile) as exc:
        raise CascadeError(f"{args.page}: cannot read the page: {exc}") from None
    url = normalize(args.urls[0])
    page = extract(raw, url=url.url, content_type="text/html")
    url_exp = bundle.url_model.explain(url, top=args.top, n_classes=args.classes)
    page_exp = bundle.page_model.explain(page, top=args.top, n_classes=args.classes,
                                         url=url.url)
    pu = bundle.url_model.predict_proba_one(url)
    pp = bundle.page_model.predict_proba([page])[0]
    words = page_word_count(page)
    fused = bundle.fusion.combine(pu, pp, words)
    best = int(np.argmax(fused.proba))
    summary = {"url": url.url, "category": bundle.classes[best],
               "confidence": round(float(fused.proba[best]), 6), "stage": fused.stage,
               "reason": fused.reason, "page_words": words}
    if args.json:
        print(json.dumps({**summary, "url_model": url_exp.to_dict(),
                          "page_model": page_exp.to_dict()}, ensure_ascii=False))
        return EXIT_OK
    print(f"{url.url}: {summary['category']} p={summary['confidence']:.3f} "
          f"(stage {fused.stage}, {fused.reason}, {words} page words)")
    _print_explanation(url_exp, "URL model:")
    _print_explanation(page_exp, "page model:")
    return EXIT_OK


def cmd_evaluate(args: argparse.Namespace) -> int:
    from cascade.evaluate import evaluate_proba
    from cascade.models.url_model import UrlModel

    model = UrlModel.load(args.model)
    stats = ReadStats()
    keys, labels, counts, _ = _load_labelled(args, stats)
    unknown = sorted(set(labels) - set(model.classes_))
    if unknown:
        raise CascadeError(f"labels not among the model's categories: {unknown[:20]}")
    if not keys:
        raise CascadeError(f"{args.input}: no usable labelled rows")
    metrics = evaluate_proba(model.predict_proba(keys), labels, model.classes_, counts=counts,
                             precision_target=args.precision_target)
    metrics["model_version"] = model.version
    text = json.dumps(metrics, indent=2, ensure_ascii=False)
    if args.output and args.output != "-":
        Path(args.output).write_text(text + "\n", encoding="utf-8")
    else:
        print(text)
    return _finish(_summary(stats, evaluated=len(keys)), stats, args.quiet)


def _fetch_setup(args: argparse.Namespace) -> tuple[Any, Any]:
    from cascade.fetch import FetchPolicy, StaticResolver, SystemResolver
    from cascade.fetch.resolver import parse_resolve_overrides

    policy = FetchPolicy(
        ports=tuple(args.port) if args.port else (80, 443),
        deadline_s=args.deadline, max_bytes=args.max_bytes,
        max_redirects=args.max_redirects, obey_robots=not args.ignore_robots,
        allow_networks=tuple(args.allow_network or ()),
    )
    if args.operator:
        policy = policy.with_operator(args.operator)
    resolver = SystemResolver()
    if args.resolve:
        resolver = StaticResolver(parse_resolve_overrides(args.resolve), fallback=resolver)
    return policy, resolver


def cmd_fetch(args: argparse.Namespace) -> int:
    import asyncio

    from cascade.fetch import Fetcher

    policy, resolver = _fetch_setup(args)
    stats = ReadStats()
    urls = [rec.url for rec in _input_records(args, stats)]

    async def run() -> int:
        failed = 0
        async with Fetcher(policy, resolver) as fetcher:
            with open_writer(args.output) as out:
                async for result in fetcher.fetch_many(urls):
                    row = result.to_dict(with_text=True)
                    if row["text"] is not None and not args.full_text:
                        row["text"] = row["text"][:args.text_chars]
                    out.write(row)
                    failed += not result.ok
        return failed

    failed = asyncio.run(run())
    return _finish(_summary(stats, fetched=len(urls), not_ok=failed), stats, args.quiet)


def cmd_refine(args: argparse.Namespace) -> int:
    import asyncio

    from cascade.bundle import ModelBundle, refine_verdict
    from cascade.fetch import Fetcher

    bundle = ModelBundle.load(args.model)
    if bundle.page_model is None:
        _eprint("refine: this model has no page model (train with pages); URL verdicts only")
    policy, resolver = _fetch_setup(args)
    stats = ReadStats()
    keyed = list(_keyed_records(_input_records(args, stats), stats))

    async def run() -> dict[str, int]:
        counts: dict[str, int] = {}
        async with Fetcher(policy, resolver) as fetcher:
            with open_writer(args.output) as out:
                async for result in fetcher.fetch_many([k.url for _, k in keyed]):
                    verdict = refine_verdict(bundle, result.url, result, top_k=args.top)
                    row = verdict.to_dict()
                    row["fetch"] = {"outcome": str(result.outcome), "status": result.status,
                                    "bytes_read": result.bytes_read,
                                    "elapsed_ms": round(result.elapsed_ms, 1),
                                    "detail": result.detail}
                    out.write(row)
                    counts[verdict.reason] = counts.get(verdict.reason, 0) + 1
        return counts

    counts = asyncio.run(run())
    return _finish(_summary(stats, refined=sum(counts.values()), by_reason=counts,
                            model_version=bundle.version), stats, args.quiet)


def _budget(args: argparse.Namespace) -> Any:
    from cascade.budget import Budget

    return Budget.parse(args.budget, args.budget_bytes, args.budget_seconds)


def _fetch_costs(path: str | None, stats: ReadStats) -> Any:
    """Per-domain fetch costs from earlier ``cascade fetch`` output (JSON Lines with
    ``url``, ``outcome``, ``bytes_read``, ``elapsed_ms``). A row without those, or with a
    negative or non-finite figure, is a bad line: counted, sampled, skipped."""
    import math

    from cascade.budget import FetchCosts

    if not path:
        return None
    rows = []
    for rec in read_records(path, fmt="jsonl", stats=stats):
        extra = rec.extra
        try:
            key = normalize(rec.url)
            if "outcome" not in extra or "bytes_read" not in extra or \
                    "elapsed_ms" not in extra:
                raise ValueError("not a fetch result (needs outcome, bytes_read, elapsed_ms)")
            nbytes, ms = float(extra["bytes_read"]), float(extra["elapsed_ms"])
            if not (math.isfinite(nbytes) and math.isfinite(ms) and nbytes >= 0 and ms >= 0):
                raise ValueError("bytes_read and elapsed_ms must be finite numbers >= 0")
        except (InvalidURL, ValueError, TypeError) as exc:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, f"fetch history: {exc}")
            continue
        rows.append({"domain": key.registered_domain or key.host,
                     "ok": str(extra["outcome"]) == "ok", "bytes": nbytes, "ms": ms})
    if not rows:
        raise CascadeError(f"{path}: no usable fetch results (is it 'cascade fetch' output?)")
    return FetchCosts.from_history(rows)


def cmd_plan(args: argparse.Namespace) -> int:

    from cascade.budget import plan
    from cascade.bundle import ModelBundle

    bundle = ModelBundle.load(args.model)
    budget = _budget(args)
    stats = ReadStats()
    keyed = list(_keyed_records(_input_records(args, stats), stats))
    if bundle.cost_model is None:
        _eprint("plan: this model has no cost model (train with pages); ranking by "
                "the URL model's confidence, weighted by lookups")
    merged: dict[str, list] = {}  # one entry per normalized URL; lookup counts summed
    for rec, key in keyed:
        entry = merged.setdefault(key.url, [key, 0])
        entry[1] += rec.count
    keys = [k for k, _ in merged.values()]
    proba = bundle.url_model.predict_proba(keys) if keys else None
    taxonomy = bundle.url_model.taxonomy_
    costs = taxonomy.costs(bundle.classes)
    history_stats = ReadStats()
    result = plan([k.url for k in keys], proba, bundle.cost_model, budget,
                  counts=[c for _, c in merged.values()],
                  domains=[k.registered_domain or k.host for k in keys],
                  fetch_costs=_fetch_costs(args.fetch_history, history_stats),
                  min_gain=args.min_gain, costs=costs)
    by_reason: dict[str, int] = {}
    with open_writer(args.output) as out:
        for item in result.fetch:
            out.write(item.to_dict())
        for item in result.skipped:
            by_reason[item.reason] = by_reason.get(item.reason, 0) + 1
            if args.all:
                out.write(item.to_dict())
    extra: dict[str, Any] = {}
    if args.fetch_history:
        extra["fetch_history"] = history_stats.to_dict()
    return _finish(_summary(stats, budget=budget.describe(), **result.totals,
                            left_out=by_reason, model_version=bundle.version, **extra), stats,
                   args.quiet)


def cmd_report(args: argparse.Namespace) -> int:
    import numpy as np

    from cascade.budget import confidence_gain
    from cascade.bundle import ModelBundle
    from cascade.models.text_features import page_word_count
    from cascade.report import build_report, write_report

    bundle = ModelBundle.load(args.model)
    stats = ReadStats()
    extras: list[dict[str, str]] = []
    keys, labels, counts, _times = _load_labelled(args, stats, extras)
    if not keys:
        raise CascadeError(f"{args.input}: no usable labelled rows")
    classes = bundle.classes
    unknown = sorted({lab for lab in labels if lab not in classes})
    if unknown:
        raise CascadeError(f"{args.input}: labels not among the model's categories: "
                           f"{unknown[:10]}")
    y = np.array([classes.index(lab) for lab in labels])
    pu = bundle.url_model.predict_proba(keys)
    pf = pu.copy()
    pages = _read_pages(args, extras, who="report")
    rows = [i for i, p in enumerate(pages) if p is not None]
    if bundle.page_model is not None and rows:
        pp = bundle.page_model.predict_proba([pages[i] for i in rows])
        words = np.array([page_word_count(pages[i]) for i in rows])
        pf[rows] = bundle.fusion.predict_proba(pu[rows], pp, words)
    else:
        _eprint("report: no pages (or no page model): every fetch keeps the URL verdict")
    if bundle.cost_model is not None:
        gain = bundle.cost_model.expected_gain(
            pu, [k.registered_domain or k.host for k in keys])["gain"]
        planner = "cost model"
    taxonomy = bundle.url_model.taxonomy_
    costs = taxonomy.costs(classes)
    if bundle.cost_model is None:
        gain = confidence_gain(pu, costs)["gain"]
        planner = "confidence (no cost model)"
    weighted = any(c != 1 for c in counts)
    rep = build_report(y, pu, pf, gain, classes, costs=costs,
                       counts=counts if weighted else None,
                       operating_budget=args.operating_budget,
                       precision_target=args.precision_target, seeds=args.seeds,
                       title=args.title,
                       context={"model": bundle.version, "labelled file": args.input,
                                "rows with a page": len(rows), "planner": planner})
    paths = write_report(rep, args.out)
    return _finish(_summary(stats, report=str(paths["html"]), json=str(paths["json"]),
                            rows=len(keys), pages=len(rows),
                            budget_table=[{"budget": r["budget"],
                                           **{s: r[s]["accuracy"] for s in
                                              ("planner", "lowest-confidence", "random",
                                               "oracle")}} for r in rep["budget_table"]]),
                   stats, args.quiet)


def cmd_demo(args: argparse.Namespace) -> int:
    from cascade.demo import run_demo

    if not 0.0 <= args.budget <= 1.0:
        raise ValueError(f"--budget must be a share of URLs between 0 and 1, not {args.budget}")
    result = run_demo(Path(args.out), seed=args.seed, n_sites=args.sites, quiet=args.quiet,
                      budget_fraction=args.budget)
    if not args.quiet:
        _eprint(json.dumps(result["headline"], indent=2))
        _eprint(f"demo: report folder {args.out}")
    return EXIT_OK


# ---------------------------------------------------------------------------- parser
def _add_input(p: argparse.ArgumentParser, required: bool = True) -> None:
    p.add_argument("--input", "-i", required=required,
                   help="URL file: plain text, CSV/TSV with a header (url, label, count, "
                        "seen_at), or JSON Lines; .gz accepted; '-' for stdin")
    p.add_argument("--input-format", choices=["txt", "csv", "tsv", "jsonl"],
                   help="override the format guessed from the name or first line")


def _add_fetch_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--resolve", action="append", metavar="HOST:ADDRESS",
                   help="answer HOST with ADDRESS instead of asking DNS (repeatable; the "
                        "address guard still applies)")
    p.add_argument("--allow-network", action="append", metavar="CIDR",
                   help="open a hole in the address guard (repeatable; for tests only)")
    p.add_argument("--port", action="append", type=int,
                   help="allowed port (repeatable; default 80 and 443)")
    p.add_argument("--deadline", type=float, default=10.0, help="seconds for a whole fetch")
    p.add_argument("--max-bytes", type=int, default=2 << 20, help="bytes read off the wire")
    p.add_argument("--max-redirects", type=int, default=5)
    p.add_argument("--ignore-robots", action="store_true",
                   help="do not obey robots.txt (only where your policy allows it)")
    p.add_argument("--operator", help="contact (URL or mail) put in the User-Agent")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="cascade",
        description="Put an acceptable-use category on URLs: a calibrated URL model first, "
                    "a sandboxed page fetch only where it pays.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"cascade {__version__}")
    parser.add_argument("--quiet", "-q", action="store_true",
                        help="no progress and no summary on stderr")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, help_text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text, description=help_text, epilog=EPILOG,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        p.add_argument("--quiet", "-q", action="store_true", default=argparse.SUPPRESS,
                       help="no progress and no summary on stderr")
        return p

    p = command("train", "Fit a URL model on a labelled file (and, for rows with a saved page, "
                         "a page model and the fusion) and save it to a directory.")
    _add_input(p)
    p.add_argument("--model", "-m", required=True, help="model directory to write")
    p.add_argument("--taxonomy", "-t",
                   help="category file (TOML), or 'demo'; default: the labels seen")
    p.add_argument("--holdout", type=float, default=0.2,
                   help="fraction held out (by time, then by domain) to measure the model "
                        "before the final fit on all rows; 0 to skip (default 0.2)")
    p.add_argument("--no-group", action="store_true",
                   help="do not keep each registered domain on one side of the holdout")
    p.add_argument("--ngram-min", type=int, default=1)
    p.add_argument("--ngram-max", type=int, default=4)
    p.add_argument("--hash-bits", type=int, default=20, help="log2 of the hashing space")
    p.add_argument("--no-tokens", action="store_true", help="character n-grams only")
    p.add_argument("--C", type=float, default=20.0, help="inverse L2 strength")
    p.add_argument("--max-iter", type=int, default=150)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--pages", help="folder of saved pages named by the input's 'page' column "
                                   "(default: the input file's folder)")
    p.add_argument("--folds", type=int, default=4,
                   help="folds for stacking the page model and fusion (default 4)")
    p.set_defaults(func=cmd_train)

    p = command("score", "Score URLs with a URL model; writes one verdict per URL.")
    p.add_argument("urls", nargs="*", help="URLs to score (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--model", "-m", required=True)
    p.add_argument("--output", "-o", default="-", help="output file ('-' stdout; .gz ok)")
    p.add_argument("--output-format", choices=["jsonl", "csv"], default=None,
                   help="default: from the output name, else jsonl")
    p.add_argument("--top", type=int, default=3, help="best categories kept per URL")
    p.add_argument("--fetch-below", type=float, default=0.8,
                   help="mark needs_fetch when confidence is under this (default 0.8)")
    p.set_defaults(func=cmd_score)

    p = command("explain", "Show which URL substrings (and, with --page, which page words) "
                           "drove a verdict (exact, per class).")
    p.add_argument("urls", nargs="+")
    p.add_argument("--page", help="a saved HTML page of the (single) URL: also explain the "
                                  "page model's verdict and show the fused one")
    p.add_argument("--model", "-m", required=True)
    p.add_argument("--top", type=int, default=8, help="features shown per class")
    p.add_argument("--classes", type=int, default=2, help="most probable classes shown")
    p.add_argument("--json", action="store_true", help="JSON Lines instead of text")
    p.set_defaults(func=cmd_explain)

    p = command("evaluate", "Measure a model on a labelled file (metrics as JSON).")
    _add_input(p)
    p.add_argument("--model", "-m", required=True)
    p.add_argument("--output", "-o", help="write the JSON here instead of stdout")
    p.add_argument("--precision-target", type=float, default=0.9)
    p.set_defaults(func=cmd_evaluate)

    p = command("fetch", "Fetch pages through the sandboxed fetcher; one JSON result a URL.")
    p.add_argument("urls", nargs="*", help="URLs to fetch (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--output", "-o", default="-")
    _add_fetch_options(p)
    p.add_argument("--text-chars", type=int, default=2000,
                   help="characters of page text kept in the output (default 2000)")
    p.add_argument("--full-text", action="store_true", help="keep the whole page text")
    p.set_defaults(func=cmd_fetch)

    p = command("refine", "Fetch URLs through the sandboxed fetcher and print fused "
                          "verdicts (URL model + page model); failures keep the URL verdict.")
    p.add_argument("urls", nargs="*", help="URLs to refine (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--output", "-o", default="-")
    p.add_argument("--top", type=int, default=3, help="best categories kept per URL")
    _add_fetch_options(p)
    p.set_defaults(func=cmd_refine)

    p = command("plan", "Choose which URLs to fetch under a budget: best expected gain per "
                        "unit of cost first; writes the fetch list (one JSON line a URL).")
    p.add_argument("urls", nargs="*", help="URLs to plan (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--budget", "-b", required=True,
                   help="most fetches: a number (500) or a share of the URLs (10%%)")
    p.add_argument("--budget-bytes", help="also cap expected bytes (e.g. 500MB, 2GiB)")
    p.add_argument("--budget-seconds", help="also cap summed fetch time, in seconds")
    p.add_argument("--fetch-history",
                   help="earlier 'cascade fetch' output (JSON Lines): learn per-domain "
                        "failure rate, bytes and time from it")
    p.add_argument("--min-gain", type=float, default=0.0,
                   help="never fetch a URL whose expected gain is not above this")
    p.add_argument("--all", action="store_true",
                   help="also write the URLs left out, each with its reason")
    p.add_argument("--output", "-o", default="-")
    p.set_defaults(func=cmd_plan)

    p = command("report", "Measure what each fetch budget buys on a labelled file with saved "
                          "pages: HTML report with plots, plus JSON.")
    _add_input(p)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--pages", help="folder of saved pages named by the input's 'page' column")
    p.add_argument("--out", required=True, help="folder for report.html, report.json, PNGs")
    p.add_argument("--operating-budget", type=float, default=0.3,
                   help="share of URLs fetched for the 'after' figures (default 0.3)")
    p.add_argument("--precision-target", type=float, default=0.95)
    p.add_argument("--seeds", type=int, default=5, help="random-order repeats (default 5)")
    p.add_argument("--title", default="cascade budget report")
    p.set_defaults(func=cmd_report)

    p = command("demo", "Run the whole job on the invented demo scenario into a folder.")
    p.add_argument("--out", default="demo-output", help="report folder (default demo-output)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--sites", type=int, default=2000, help="invented sites (default 2000)")
    p.add_argument("--budget", type=float, default=0.3,
                   help="share of the night's URLs the plan may fetch (default 0.3)")
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not hasattr(args, "quiet"):
        args.quiet = False
    try:
        return int(args.func(args))
    except CascadeError as exc:
        _eprint(f"cascade {args.command}: error: {exc}")
        return EXIT_FILE
    except ValueError as exc:
        _eprint(f"cascade {args.command}: error: {exc}")
        return EXIT_USAGE
    except KeyboardInterrupt:
        _eprint(f"cascade {args.command}: interrupted")
        return 130
    except BrokenPipeError:
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
