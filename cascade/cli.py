"""The ``cascade`` command: argument parsing and printing only; the work is done by the
library modules (``cascade.training``, ``cascade.bundle``, ``cascade.budget``, ...).

Exit codes (``EXIT_CODES`` is the one table; also in ``cascade --help``):
  0    done, every input line used
  1    unexpected internal error (a bug: please report it with the traceback)
  2    usage error (bad options or arguments)
  3    done, but some input lines were bad and skipped (counted, samples in the summary)
  4    a file could not be used (model directory, taxonomy, input file, too little data)
  5    done, but every fetch failed (fetch, refine, night: see the outcomes in the summary)
  130  interrupted (Ctrl-C); 143 stopped by SIGTERM. Rows already written are kept in
       ``<output>.partial`` (never under the output's own name) and the summary says so
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import traceback
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from cascade import __version__
from cascade.errors import (
    CascadeError,
    DataError,
    InputFormatError,
    InvalidURL,
    ModelFileError,
    StoreError,
    TaxonomyError,
    UsageError,
)
from cascade.io import InputRecord, Progress, ReadStats, open_writer, read_records

__all__ = ["EXIT_CODES", "build_parser", "exit_code_for", "main"]

EXIT_OK, EXIT_BUG, EXIT_USAGE, EXIT_PARTIAL, EXIT_FILE, EXIT_INTERRUPTED = 0, 1, 2, 3, 4, 130
EXIT_NO_FETCH, EXIT_TERMINATED = 5, 143
#: ``--precision-target`` of ``evaluate`` and ``report`` (one default for both).
PRECISION_TARGET = 0.95


class Terminated(KeyboardInterrupt):  # noqa: N818 - a signal, handled like Ctrl-C
    """SIGTERM, raised in the main thread so that every ``with`` block unwinds as on
    Ctrl-C: writers keep their rows in ``.partial`` files, fetchers close."""

#: Exception type to exit code, most specific first; anything else is a bug (exit 1).
EXIT_CODES: tuple[tuple[type[BaseException], int], ...] = (
    (UsageError, EXIT_USAGE),
    (InvalidURL, EXIT_USAGE),
    (ModelFileError, EXIT_FILE),
    (TaxonomyError, EXIT_FILE),
    (InputFormatError, EXIT_FILE),
    (DataError, EXIT_FILE),
    (StoreError, EXIT_FILE),
    (FileNotFoundError, EXIT_FILE),
    (IsADirectoryError, EXIT_FILE),
    (PermissionError, EXIT_FILE),
    (CascadeError, EXIT_FILE),
)
CHUNK = 4096

#: ``UrlModel``'s defaults as ``cascade train`` shows them (kept here so that ``--help`` does
#: not import the numeric stack; ``tests/test_cli.py`` checks them against the signature).
URL_MODEL_DEFAULTS: dict[str, Any] = {"ngram_min": 3, "ngram_max": 6, "hash_bits": 20,
                                      "C": 50.0, "tol": 3e-4, "max_iter": 2000,
                                      "class_balance": 1.0}

EPILOG = """exit codes: 0 done; 1 internal error (a bug); 2 usage error; 3 done but some input
lines were skipped (see the summary on stderr); 4 a model, taxonomy or input file could not
be used; 5 done but every fetch failed; 130 interrupted (Ctrl-C); 143 stopped (SIGTERM).
On 130/143 the rows already written are kept in <output>.partial.

Categories are probabilities, not facts. Lookup logs are personal data: handle them under
your organisation's policy and local law. The policy owner decides what to block."""


def exit_code_for(exc: BaseException) -> int:
    """The exit code of an exception that ended a command (``EXIT_CODES``)."""
    for kind, code in EXIT_CODES:
        if isinstance(exc, kind):
            return code
    return EXIT_BUG


# ---------------------------------------------------------------------------- helpers
def _eprint(*args: Any) -> None:
    print(*args, file=sys.stderr, flush=True)


def _finish(summary: dict[str, Any], stats: ReadStats, quiet: bool = False) -> int:
    summary = {"input": stats.to_dict(), **summary}
    if not quiet:
        _eprint(json.dumps(summary, ensure_ascii=False))
    return EXIT_PARTIAL if stats.bad else EXIT_OK


def _chunks(items: Iterator[Any], size: int = CHUNK) -> Iterator[list[Any]]:
    chunk: list[Any] = []
    for item in items:
        chunk.append(item)
        if len(chunk) >= size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def _columns(args: argparse.Namespace) -> dict[str, str] | None:
    names = {field: getattr(args, f"{field}_column", None) for field in ("url", "label")}
    names = {k: v for k, v in names.items() if v}
    return names or None


def _read(args: argparse.Namespace, path: str, stats: ReadStats) -> Any:
    return read_records(path, fmt=args.input_format, stats=stats, columns=_columns(args),
                        delimiter=getattr(args, "delimiter", None))


def _input_records(args: argparse.Namespace, stats: ReadStats) -> Iterator[InputRecord]:
    if getattr(args, "urls", None):
        for i, u in enumerate(args.urls, 1):
            stats.lines += 1
            stats.records += 1
            yield InputRecord(line_no=i, url=u)
        return
    source = args.input or "-"
    if source == "-" and _is_terminal(sys.stdin) and not args.quiet:
        _eprint(f"{args.command}: reading URLs from standard input, one per line; end with "
                "Ctrl-D (or give URLs, or --input FILE)")
    yield from _read(args, source, stats)


def _is_terminal(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


def _keyed(args: argparse.Namespace, stats: ReadStats) -> Iterator[tuple[InputRecord, Any]]:
    from cascade.lookups import keyed_records

    return keyed_records(_input_records(args, stats), stats)


def _load_taxonomy(path: str | None) -> Any:
    from cascade.taxonomy import demo_taxonomy, load_taxonomy

    if path is None:
        return None
    if path == "demo":
        return demo_taxonomy()
    return load_taxonomy(path)


def _load_labelled(args: argparse.Namespace, stats: ReadStats) -> tuple[
        list[Any], list[str], list[int], list[str | None], list[dict[str, str]]]:
    """Rows with a URL and a label (a row without a label is a bad line)."""
    from cascade.lookups import keyed_records

    keys, labels, counts, times, extras = [], [], [], [], []
    progress = Progress(label="reading", enabled=None if not args.quiet else False)
    for rec, key in keyed_records(_read(args, args.input, stats), stats):
        if not rec.label:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, "no label")
            continue
        keys.append(key)
        labels.append(rec.label)
        counts.append(rec.count)
        times.append(rec.seen_at)
        extras.append(rec.extra)
        progress.update()
    progress.close()
    return keys, labels, counts, times, extras


def _pages(args: argparse.Namespace, extras: list[dict[str, str]], who: str) -> list[Any]:
    from cascade.saved_pages import row_pages

    base = Path(args.pages) if args.pages else Path(args.input).parent
    return row_pages(extras, base, warn=lambda m: _eprint(f"{who}: {m}"))


def _labels_known(labels: Sequence[str], classes: Sequence[str], where: str) -> None:
    unknown = sorted(set(labels) - set(classes))
    if unknown:
        raise DataError(f"{where}: labels not among the model's categories: {unknown[:20]}")


def _write_json(obj: Any, target: str | None) -> None:
    text = json.dumps(obj, indent=2, ensure_ascii=False)
    if target and target != "-":
        Path(target).write_text(text + "\n", encoding="utf-8")
    else:
        print(text)


# ---------------------------------------------------------------------------- commands
def cmd_train(args: argparse.Namespace) -> int:
    from cascade.models.url_model import UrlModel
    from cascade.training import check_labels, train

    stats = ReadStats()
    keys, labels, counts, times, extras = _load_labelled(args, stats)
    if len(keys) < 2:
        raise DataError(f"{args.input}: fewer than two usable labelled rows (is the label "
                        "column named 'label'? --label-column names it)")
    checked = check_labels(labels, _load_taxonomy(args.taxonomy), fold_case=args.fold_case,
                           absent=args.absent_categories)
    for line in checked.warnings:
        _eprint(f"train: warning: {line}")
    labels = checked.labels
    pages = _pages(args, extras, "train")
    d = URL_MODEL_DEFAULTS
    given = {"C": args.C, "tol": args.tol, "max_iter": args.max_iter,
             "class_balance": args.class_balance}
    url_model = UrlModel(
        ngram_range=(d["ngram_min"] if args.ngram_min is None else args.ngram_min,
                     d["ngram_max"] if args.ngram_max is None else args.ngram_max),
        n_features=2**(d["hash_bits"] if args.hash_bits is None else args.hash_bits),
        use_tokens=not args.no_tokens, seed=args.seed,
        **{k: v for k, v in given.items() if v is not None})
    try:
        url_model._check_params()
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    bundle, metrics = train(
        keys, labels, pages=pages, times=times, counts=counts,
        taxonomy=checked.taxonomy, url_model=url_model, folds=args.folds,
        holdout=args.holdout, group_by_domain=not args.no_group, seed=args.seed,
        progress=None if args.quiet else lambda m: _eprint(f"train: {m}"))
    bundle.save(args.model, metrics=metrics)
    summary: dict[str, Any] = {"model": str(args.model), "version": bundle.version,
                               "classes": len(bundle.classes),
                               "metrics_held_out": bool(metrics)}
    if checked.folded:
        summary["labels_folded"] = checked.folded
    if checked.absent:
        summary["categories_without_rows"] = {
            "names": list(checked.absent), "kept": args.absent_categories == "keep"}
    if bundle.page_model is not None:
        summary.update(pages=sum(p is not None for p in pages), stacking=bundle.report)
    else:
        summary.update(temperature=bundle.url_model.temperature_,
                       seconds=bundle.url_model.training_["seconds"])
    return _finish(summary, stats, args.quiet)


def cmd_score(args: argparse.Namespace) -> int:
    from cascade.bundle import ModelBundle

    bundle = ModelBundle.load(args.model)  # scores with the URL stage; named as a whole
    stats = ReadStats()
    progress = Progress(label="scoring", enabled=None if not args.quiet else False)
    written = 0
    if args.output == "-" and args.output_format is None and _is_terminal(sys.stdout):
        return _score_table(args, bundle, stats)
    header: list[str] | None = None  # CSV: the columns, from the first chunk's rows
    dropped: dict[str, int] = {}
    with open_writer(args.output, fmt=args.output_format) as out:
        csv_out = out.format != "jsonl"
        for chunk in _chunks(_keyed(args, stats)):
            keys = [k for _, k in chunk]
            verdicts = bundle.verdicts(keys, fetch_below=args.fetch_below, top_k=args.top)
            rows = [_joined(rec, v.to_dict()) for (rec, _), v in zip(chunk, verdicts,
                                                                      strict=True)]
            if csv_out:
                if header is None:  # JSON Lines input may give rows different fields
                    header = list(dict.fromkeys(k for row in rows for k in row))
                    header_set = set(header)
                for i, row in enumerate(rows):
                    for k in row.keys() - header_set:
                        dropped[k] = dropped.get(k, 0) + 1
                    row = {k: row.get(k) for k in header}
                    row["top"] = json.dumps(row["top"])
                    rows[i] = row
            for row in rows:
                out.write(row)
                written += 1
            progress.update(len(chunk))
    progress.close()
    if dropped and not args.quiet:
        _eprint(f"score: input fields first seen after the CSV header was written were left "
                f"out: {dropped} (rows); --output-format jsonl keeps every field")
    return _finish({"scored": written, "model_version": bundle.version}, stats, args.quiet)


def _score_table(args: argparse.Namespace, bundle: Any, stats: ReadStats) -> int:
    """``score`` on a terminal: a readable table instead of JSON (``--output-format jsonl``
    or a pipe gives the JSON Lines)."""
    rows = []
    for chunk in _chunks(_keyed(args, stats)):
        verdicts = bundle.verdicts([k for _, k in chunk], fetch_below=args.fetch_below,
                                   top_k=args.top)
        for (rec, _), v in zip(chunk, verdicts, strict=True):
            others = ", ".join(f"{c} {p:.2f}" for c, p in v.top[1:])
            rows.append((str(rec.line_no), rec.url, v.category, f"{v.confidence:.3f}",
                         "yes" if v.needs_fetch else "no", others))
    head = ("line", "URL as given", "category", "confidence", "fetch?", "next guesses")
    widths = [min(60, max(len(r[i]) for r in [head, *rows])) for i in range(len(head))]
    for r in [head, *rows]:
        print("  ".join(cell[:w].ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip())
    return _finish({"scored": len(rows), "model_version": bundle.version}, stats, args.quiet)


def _joined(rec: InputRecord, row: dict[str, Any]) -> dict[str, Any]:
    """An output row that joins back to its input: the line number and the URL exactly as
    given (``url`` is the normalized form: two spellings of one address share it), then
    the input's other columns (prefixed ``input_`` where a name is taken)."""
    out: dict[str, Any] = {"line": rec.line_no, "input": rec.url, **row}
    for name, value in rec.extra.items():
        out[f"input_{name}" if name in out else name] = value
    return out


def _print_explanation(exp: Any, title: str | None = None, top: int = 8) -> None:
    """Per class: the bias apart, then the URL's text as quoted spans (overlapping n-grams
    merged, host or path said), then word tokens; what is not shown is summed last."""
    if title:
        print(title)
    for cls, rest in zip(exp.classes, exp.rest, strict=True):
        print(f"  {cls.category:<14} p={cls.probability:.3f}  logit={cls.logit:+.3f}")
        print(f"      {cls.bias:+.3f}  bias   (the category's base rate in training)")
        shown = 0.0
        if cls.spans:
            for sp in cls.spans[:top]:
                print(f"      {sp.value:+.3f}  {sp.place:<6} {json.dumps(sp.text)}")
                shown += sp.value
            tokens = [c for c in cls.contributions if c.kind == "token"][:top]
            for c in tokens:
                print(f"      {c.value:+.3f}  token  {c.feature}")
                shown += c.value
            other = cls.logit - cls.bias - shown
        else:
            for c in cls.contributions:
                print(f"      {c.value:+.3f}  {c.kind:<6} {c.feature}")
            other = rest
        print(f"      {other:+.3f}  everything not listed above")


def cmd_explain(args: argparse.Namespace) -> int:
    from cascade.bundle import ModelBundle

    bundle = ModelBundle.load(args.model)
    page = None
    if args.page:
        from cascade.saved_pages import read_page_file

        if len(args.urls) != 1:
            raise UsageError("--page explains one URL at a time")
        if not bundle.has_pages:
            raise DataError(f"{args.model}: no page model here (train with pages)")
        page = read_page_file(args.page)
    bad = 0
    for url in args.urls:
        try:
            exp = bundle.explain(url, page=page, top=args.top, n_classes=args.classes)
        except InvalidURL as exc:
            bad += 1
            _eprint(f"explain: {exc}")
            continue
        if args.json:
            print(json.dumps(exp.to_dict() if page is not None else exp.url_model.to_dict(),
                             ensure_ascii=False))
            continue
        v = exp.verdict
        if page is None:
            print(exp.url_model.url)
            _print_explanation(exp.url_model, top=args.top)
            continue
        print(f"{v.url}: {v.category} p={v.confidence:.3f} (stage {v.stage}, {v.reason}, "
              f"{exp.page_words} page words)")
        _print_explanation(exp.url_model, "URL model:", top=args.top)
        _print_explanation(exp.page_model, "page model:", top=args.top)
    return EXIT_PARTIAL if bad else EXIT_OK


def cmd_evaluate(args: argparse.Namespace) -> int:
    from cascade.bundle import ModelBundle
    from cascade.evaluate import evaluate_proba, per_class_change

    bundle = ModelBundle.load(args.model)
    model = bundle.url_model
    stats = ReadStats()
    keys, labels, counts, _, extras = _load_labelled(args, stats)
    _labels_known(labels, model.classes_, args.input)
    if not keys:
        raise DataError(f"{args.input}: no usable labelled rows")
    risk = {c.name: c.risk for c in bundle.taxonomy.categories}
    weighted = counts if any(c != 1 for c in counts) else None
    pu = bundle.url_proba(keys)
    metrics = evaluate_proba(pu, labels, model.classes_, counts=weighted,
                             precision_target=args.precision_target, risk=risk)
    metrics["model_version"] = bundle.version
    if args.pages is not None:
        if not bundle.has_pages:
            raise DataError(f"{args.model}: no page model here (train with pages), so there "
                            "is no fused verdict to evaluate")
        pages = _pages(args, extras, "evaluate")
        with_page = sum(p is not None for p in pages)
        if not with_page:
            raise DataError(f"{args.input}: no row has a saved page (a 'page' column naming "
                            f"a file under {args.pages})")
        fused = evaluate_proba(bundle.predict_proba(keys, pages, url_proba=pu), labels,
                               model.classes_, counts=weighted,
                               precision_target=args.precision_target, risk=risk)
        change = per_class_change(metrics, fused)
        metrics = {"url_model": metrics, "fused": {**fused, "rows_with_a_page": with_page},
                   "fusion_change": change, "model_version": bundle.version}
        for name in change["worse"]:
            row = change["per_class"][name]
            _eprint(f"evaluate: warning: fusion makes {name!r} worse: F1 "
                    f"{row['f1_before']:.3f} with the URL model alone, {row['f1_after']:.3f} "
                    "fused")
    _write_json(metrics, args.output)
    return _finish({"evaluated": len(keys)}, stats, args.quiet)


def _fetch_setup(args: argparse.Namespace) -> tuple[Any, Any]:
    """The ``FetchPolicy`` and resolver the fetch options ask for; a bad value is a
    ``UsageError`` (exit 2). Warns on stderr when no ``--operator`` names who fetches, and
    when ``--dangerously-allow-wide-networks`` is given."""
    from cascade.fetch import FetchPolicy, StaticResolver, SystemResolver
    from cascade.fetch.resolver import parse_resolve_overrides

    try:
        policy = FetchPolicy(
            ports=tuple(args.port) if args.port else FetchPolicy.ports,
            deadline_s=args.deadline, max_bytes=args.max_bytes,
            max_redirects=args.max_redirects, obey_robots=not args.ignore_robots,
            per_host_concurrency=args.per_host_concurrency,
            per_host_delay_s=args.per_host_delay, max_queue_s=args.max_queue,
            allow_networks=tuple(args.allow_network or ()),
            allow_wide_networks=args.dangerously_allow_wide_networks,
        )
        if args.operator is not None:
            policy = policy.with_operator(args.operator)
        resolver = SystemResolver()
        if args.resolve:
            resolver = StaticResolver(parse_resolve_overrides(args.resolve), fallback=resolver)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    if args.operator is None:
        _eprint(f"{args.command}: no --operator given: sites cannot tell who is fetching; "
                "name your organisation's contact (a URL or mailto: address)")
    if args.dangerously_allow_wide_networks:
        _eprint(f"{args.command}: warning: --dangerously-allow-wide-networks: the address "
                "guard lets through every address in "
                f"{', '.join(map(str, policy.allow_networks)) or '(no --allow-network)'}")
    return policy, resolver


def cmd_fetch(args: argparse.Namespace) -> int:
    import asyncio

    from cascade.fetch import Fetcher

    policy, resolver = _fetch_setup(args)
    stats = ReadStats()
    urls = [rec.url for rec in _input_records(args, stats)]

    async def run(out: Any) -> int:
        failed = 0
        async with Fetcher(policy, resolver) as fetcher:
            async for result in fetcher.fetch_many(urls):
                row = result.to_dict(with_text=True)
                if row["text"] is not None and not args.full_text:
                    row["text"] = row["text"][:args.text_chars]
                out.write(row)
                failed += not result.ok
        return failed

    # the writer outside the event loop: an interrupt reaches it and keeps the rows
    with open_writer(args.output) as out:
        failed = asyncio.run(run(out))
    code = _finish({"fetched": len(urls), "not_ok": failed}, stats, args.quiet)
    return _all_failed(args, len(urls), failed) or code


def _all_failed(args: argparse.Namespace, tried: int, failed: int) -> int:
    """``EXIT_NO_FETCH`` (and a line saying so) when fetches were tried and none worked."""
    if tried and failed >= tried:
        if not args.quiet:
            _eprint(f"{args.command}: every fetch failed ({failed} of {tried}); see the "
                    "outcomes in the output (network, DNS, the address guard, robots.txt)")
        return EXIT_NO_FETCH
    return 0


def cmd_refine(args: argparse.Namespace) -> int:
    import asyncio

    from cascade.bundle import ModelBundle
    from cascade.fetch import Fetcher

    bundle = ModelBundle.load(args.model)
    if not bundle.has_pages:
        _eprint("refine: this model has no page model (train with pages); URL verdicts only")
    policy, resolver = _fetch_setup(args)
    stats = ReadStats()
    keyed = list(_keyed(args, stats))
    done = _done_urls(args.resume) if args.resume else set()

    records: dict[str, list[InputRecord]] = {}
    for rec, k in keyed:
        if k.url not in done:
            records.setdefault(k.url, []).append(rec)
    if done and not args.quiet:
        _eprint(f"refine: {len(done)} URLs already refined in {args.resume} are skipped; "
                f"{len(records)} left")
    failed = 0

    async def run(out: Any) -> dict[str, int]:
        nonlocal failed
        counts: dict[str, int] = {}
        async with Fetcher(policy, resolver) as fetcher:
            async for result in fetcher.fetch_many(list(records)):
                (verdict,) = bundle.verdicts([result.url], fetches=[result], top_k=args.top)
                failed += not result.ok
                fetch = {"outcome": str(result.outcome), "status": result.status,
                         "bytes_read": result.bytes_read,
                         "elapsed_ms": round(result.elapsed_ms, 1), "detail": result.detail}
                # one fetch per distinct URL, one row per input line (joins back to the log)
                for rec in records.get(result.url) or [None]:
                    row = verdict.to_dict() if rec is None else _joined(rec, verdict.to_dict())
                    row["fetch"] = fetch
                    out.write(row)
                counts[str(verdict.reason)] = counts.get(str(verdict.reason), 0) + 1
        return counts

    # the writer outside the event loop: an interrupt reaches it and keeps the fetched rows
    with open_writer(args.output) as out:
        if args.resume:  # the earlier rows first: the output is then the whole result
            for row in _json_rows(args.resume):
                out.write(row)
        counts = asyncio.run(run(out))
    code = _finish({"refined": sum(counts.values()), "by_reason": counts,
                    "fetch_failed": failed, "model_version": bundle.version}, stats, args.quiet)
    return _all_failed(args, sum(counts.values()), failed) or code


def _json_rows(path: str) -> Iterator[dict[str, Any]]:
    """The rows of an earlier JSON Lines output (``.gz`` too), as written."""
    import gzip

    with open(path, "rb") as probe:
        gz = probe.read(2) == b"\x1f\x8b"
    with (gzip.open(path, "rt", encoding="utf-8") if gz else
          open(path, encoding="utf-8")) as fh:
        for line in fh:
            if line.strip():
                try:
                    row = json.loads(line)
                except ValueError:
                    continue  # a last line cut short by the stop
                if isinstance(row, dict) and isinstance(row.get("url"), str):
                    yield row


def _done_urls(path: str) -> set[str]:
    """The normalized URLs of an earlier (partial) ``refine`` output, to skip them."""
    from cascade.urls import normalize

    if not Path(path).is_file():
        raise InputFormatError(f"--resume {path}: no such file")
    done: set[str] = set()
    for row in _json_rows(path):
        try:
            done.add(normalize(row["url"]).url)
        except InvalidURL:
            continue
    return done


def _budget(args: argparse.Namespace) -> Any:
    from cascade.budget import Budget

    try:
        return Budget.parse(args.budget, args.budget_bytes, args.budget_seconds)
    except ValueError as exc:
        raise UsageError(str(exc)) from None


def cmd_plan(args: argparse.Namespace) -> int:
    from cascade.budget import plan
    from cascade.bundle import ModelBundle
    from cascade.fetch_history import read_fetch_history
    from cascade.lookups import merge_lookups

    bundle = ModelBundle.load(args.model)
    budget = _budget(args)
    stats = ReadStats()
    lookups = merge_lookups(_keyed(args, stats))
    if bundle.value_model is None:
        _eprint("plan: this model has no fetch-value model (train with pages); ranking by "
                "the URL model's confidence, weighted by lookups")
    history_stats = ReadStats()
    fetch_costs = read_fetch_history(args.fetch_history, history_stats) \
        if args.fetch_history else None
    keys = [lk.key for lk in lookups]
    proba = bundle.url_proba(keys) if keys else None
    result = plan([k.url for k in keys], proba, bundle.value_model, budget,
                  counts=[lk.count for lk in lookups],
                  domains=[k.registered_domain or k.host for k in keys],
                  fetch_costs=fetch_costs, min_gain=args.min_gain,
                  costs=bundle.taxonomy.costs(bundle.classes))
    by_reason: dict[str, int] = {}
    with open_writer(args.output) as out:
        for item in result.fetch:
            out.write(item.to_dict())
        for item in result.skipped:
            by_reason[str(item.reason)] = by_reason.get(str(item.reason), 0) + 1
            if args.all:
                out.write(item.to_dict())
    extra: dict[str, Any] = {}
    if args.fetch_history:
        extra["fetch_history"] = history_stats.to_dict()
    return _finish({"budget": budget.describe(), **result.totals, "left_out": by_reason,
                    "model_version": bundle.version, **extra}, stats, args.quiet)


def cmd_report(args: argparse.Namespace) -> int:
    import numpy as np

    from cascade.bundle import ModelBundle
    from cascade.report import build_report, write_report

    bundle = ModelBundle.load(args.model)
    stats = ReadStats()
    keys, labels, counts, _times, extras = _load_labelled(args, stats)
    if not keys:
        raise DataError(f"{args.input}: no usable labelled rows")
    classes = bundle.classes
    _labels_known(labels, classes, args.input)
    y = np.array([classes.index(lab) for lab in labels])
    if not bundle.has_pages:
        raise DataError(f"{args.model}: a URL-only model (no page model): a fetch could not "
                        "change any verdict, so every budget would buy nothing. Train with "
                        "pages ('cascade train --pages'), or use 'cascade evaluate' for the "
                        "URL model alone")
    pages = _pages(args, extras, "report")
    with_page = sum(p is not None for p in pages)
    if not with_page:
        raise DataError(f"{args.input}: no row has a saved page (a 'page' column naming a "
                        "file under --pages): the report measures what fetching buys, and "
                        "without pages nothing can be measured")
    pu = bundle.url_proba(keys)
    shift: dict[str, Any] | None = None
    if args.prior_shift:  # the labels only describe the result; EM does not read them
        from cascade.prior_shift import adjust_to_batch

        pu, shift = adjust_to_batch(pu, bundle.url_model, y_true=y)
        _eprint(f"report: prior shift: {shift['note']}")
    pf = bundle.predict_proba(keys, pages, url_proba=pu)
    gain = bundle.expected_gain(pu, [k.registered_domain or k.host for k in keys],
                                urls=keys)["gain"]
    weighted = any(c != 1 for c in counts)
    extra_context = {} if shift is None else {"prior shift": shift["note"]}
    fetch_costs = None
    if args.fetch_history:
        from cascade.fetch_history import read_fetch_history

        fetch_costs = read_fetch_history(args.fetch_history, ReadStats())
    rep = build_report(y, pu, pf, gain, classes, costs=bundle.taxonomy.costs(classes),
                       fetch_costs=fetch_costs, concurrency=args.concurrency,
                       domains=[k.registered_domain or k.host for k in keys],
                       risk={c.name: c.risk for c in bundle.taxonomy.categories},
                       counts=counts if weighted else None,
                       operating_budget=args.operating_budget,
                       precision_target=args.precision_target, seeds=args.seeds,
                       title=args.title,
                       context={"model": bundle.version, "labelled file": args.input,
                                "rows with a page": with_page,
                                "planner": bundle.planner_name, **extra_context})
    if shift is not None:
        rep["prior_shift"] = shift
    paths = write_report(rep, args.out)
    table = [{"budget": r["budget"], **{s: r[s]["accuracy"] for s in
                                        ("planner", "lowest-confidence", "random", "oracle")}}
             for r in rep["budget_table"]]
    return _finish({"report": str(paths["html"]), "json": str(paths["json"]),
                    "rows": len(keys), "pages": with_page, "budget_table": table,
                    **({} if shift is None else {"prior_shift": shift})},
                   stats, args.quiet)


def cmd_night(args: argparse.Namespace) -> int:
    from cascade.batch import NightOptions, run_night
    from cascade.bundle import ModelBundle
    from cascade.fetch import Fetcher
    from cascade.store import VerdictStore

    log = Path(args.log)
    if not log.is_file():
        raise InputFormatError(f"{log}: no such log file")
    bundle = ModelBundle.load(args.model)
    policy, resolver = _fetch_setup(args)
    options = NightOptions(budget=_budget(args), fetch_below=args.fetch_below,
                           review_size=args.review_size, use_history=not args.no_history,
                           prior_shift=args.prior_shift, url_column=args.url_column,
                           delimiter=args.delimiter,
                           progress=False if args.quiet else None)
    client = None
    if args.engine == "dask" and args.dask_scheduler:
        from distributed import Client

        client = Client(args.dask_scheduler)
    with VerdictStore.open(args.store) as store:
        result = run_night(bundle, store, log, args.out, options=options,
                           fetcher_factory=lambda: Fetcher(policy, resolver),
                           run_id=args.run_id, log_format=args.input_format,
                           say=None if args.quiet else lambda m: _eprint(f"night: {m}"),
                           engine=args.engine, dask_client=client)
    rep = result.report
    summary = {"run_id": result.run_id, "resumed": result.resumed, "decided": rep["decided"],
               "spent": rep["spent"], "fetch_outcomes": rep["fetch_outcomes"],
               "coverage_after": rep["coverage_after"]["share"],
               "outputs": {k: str(v) for k, v in result.paths.items()}}
    stats = ReadStats(lines=rep["input"]["lines"], records=rep["input"]["records"],
                      bad=rep["input"]["bad"])
    code = _finish(summary, stats, args.quiet)
    outcomes = rep["fetch_outcomes"]
    tried = sum(outcomes.values())
    return _all_failed(args, tried, tried - outcomes.get("ok", 0)) or code


def cmd_store(args: argparse.Namespace) -> int:
    from cascade.store import VerdictStore

    readonly = args.action in ("export", "training", "stats")
    with VerdictStore.open(args.store, readonly=readonly, create=not readonly) as store:
        if args.action == "export":
            n = store.export(args.file or "-")
            result: dict[str, Any] = {"exported": n}
        elif args.action == "import":
            if not args.file:
                raise UsageError("store import needs --file")
            result = store.import_verdicts(args.file)
        elif args.action == "training":
            if not args.file:
                raise UsageError("store training needs --file (the labelled CSV to write)")
            result = {"rows": store.export_training(args.file, args.min_page_confidence)}
        elif args.action == "label":
            from cascade.urls import normalize

            if not (args.url and args.category):
                raise UsageError("store label needs --url and --category")
            store.label(normalize(args.url).url, args.category, analyst=args.analyst)
            result = {"labelled": normalize(args.url).url}
        else:
            result = store.counts()
    if not args.quiet:
        _eprint(json.dumps(result))
    return EXIT_OK


def cmd_serve(args: argparse.Namespace) -> int:
    import logging

    from cascade.service import Triage, TriagePolicy
    from cascade.service_http import ServeConfig, load_token, serve

    try:
        import starlette  # noqa: F401
        import uvicorn  # noqa: F401
    except ImportError as exc:
        raise UsageError(f"cascade serve needs the serve extra ({exc.name} is missing): "
                         "pip install -e '.[serve]'") from None

    config = ServeConfig(host=args.host, port=args.port, token=load_token(args.token_file),
                         max_body_bytes=args.max_body_bytes, max_batch=args.max_batch,
                         access_log=args.access_log)
    policy = TriagePolicy(fetch_below=args.fetch_below,
                          domain_fallback=not args.no_domain_fallback,
                          cache_size=args.cache_size, queue=not args.no_queue)
    logging.basicConfig(level=logging.WARNING if args.quiet else logging.INFO,
                        format="%(message)s", stream=sys.stderr)
    with Triage.open(args.model, args.store, policy, create_store=args.create_store) as triage:
        if not args.quiet:
            _eprint(f"serve: model {triage.model_version} on http://{args.host}:{args.port}/ "
                    f"(store {triage.store_path or 'none'}); Ctrl-C to stop")
        serve(triage, config)
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from cascade.demo import run_demo

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
    p.add_argument("--url-column", metavar="NAME",
                   help="the input's column (or JSON key) holding the URL or host "
                        "(default: url)")
    p.add_argument("--label-column", metavar="NAME",
                   help="the input's column (or JSON key) holding the category "
                        "(default: label)")
    p.add_argument("--delimiter", type=_delimiter, metavar="CHAR",
                   help="CSV column separator, e.g. ';' or 'tab' (default: ',' for CSV, "
                        "tab for TSV; ';' and '|' headers are recognised)")


def _whole(minimum: int) -> Any:
    """An argparse type: a whole number of at least ``minimum`` (else a usage error)."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"must be at least {minimum}, not {value}")
        return value
    parse.__name__ = "whole number"
    return parse


def _unit_value(text: str) -> float:
    """An argparse type for a threshold from 0 to 1 (``--fetch-below``, ``--precision-target``):
    a number, or a percentage."""
    raw = str(text).strip()
    try:
        value = float(raw[:-1]) / 100.0 if raw.endswith("%") else float(raw)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0.0 <= value <= 1.0:
        raise argparse.ArgumentTypeError(f"must be between 0 and 1, not {text}")
    return value


def _share_value(text: str) -> float:
    """An argparse type: a share from 0 to 1, as ``0.3`` or ``30%`` (``budget.parse_share``)."""
    from cascade.budget import parse_share

    try:
        return parse_share(text, what="value")
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _delimiter(text: str) -> str:
    value = "\t" if text in ("\\t", "tab", "TAB") else text
    if len(value) != 1:
        raise argparse.ArgumentTypeError(f"a delimiter is one character (or 'tab'), not "
                                         f"{text!r}")
    return value


def _add_precision_target(p: argparse.ArgumentParser) -> None:
    """One option, one default for ``evaluate`` and ``report``."""
    p.add_argument("--precision-target", type=_unit_value, default=PRECISION_TARGET,
                   help="precision at which the recall figure is read, per category "
                        "(default %(default)s in 'evaluate' and 'report')")


def _add_prior_shift(p: argparse.ArgumentParser, batch: str) -> None:
    p.add_argument("--prior-shift", action="store_true",
                   help=f"re-estimate the class mix of {batch} by EM and adjust the URL "
                        "model's probabilities to it (assumes only the mix changed; "
                        "docs/night.md)")


def _add_fetch_options(p: argparse.ArgumentParser) -> None:
    from cascade.fetch.policy import FetchPolicy

    default = FetchPolicy()
    p.add_argument("--resolve", action="append", metavar="HOST:ADDRESS",
                   help="answer HOST with ADDRESS instead of asking DNS (repeatable; the "
                        "address guard still applies; default: none, DNS answers)")
    p.add_argument("--allow-network", action="append", metavar="CIDR",
                   help="open a hole in the address guard (repeatable; for tests only, "
                        "e.g. 127.0.0.1/32; default: none). A global block wider than /24 "
                        "(IPv4) or /48 (IPv6) is refused unless "
                        "--dangerously-allow-wide-networks")
    p.add_argument("--dangerously-allow-wide-networks", action="store_true",
                   help="DANGEROUS: accept --allow-network blocks of any size, even "
                        "0.0.0.0/0 or ::/0. Every address inside them, loopback, private "
                        "networks and the cloud metadata address included, becomes "
                        "fetchable: any URL, or any redirect from one, can then reach your "
                        "internal services (default: %(default)s)")
    p.add_argument("--port", action="append", type=int,
                   help="allowed port (repeatable; default: "
                        f"{' and '.join(map(str, default.ports))})")
    p.add_argument("--deadline", type=float, default=default.deadline_s, metavar="SECONDS",
                   help="seconds for a whole fetch, DNS to the last byte (default: "
                        "%(default)s)")
    p.add_argument("--max-bytes", type=int, default=default.max_bytes,
                   help="bytes read off the wire per response (default: %(default)s)")
    p.add_argument("--max-redirects", type=_whole(0), default=default.max_redirects,
                   help="redirects followed per fetch (default: %(default)s)")
    p.add_argument("--per-host-concurrency", type=_whole(1),
                   default=default.per_host_concurrency,
                   metavar="N", help="fetches in flight at once to one host "
                                     "(default: %(default)s)")
    p.add_argument("--per-host-delay", type=float, default=default.per_host_delay_s,
                   metavar="SECONDS", help="least time between two requests to one host "
                                           "(default: %(default)s)")
    p.add_argument("--max-queue", type=float, default=default.max_queue_s, metavar="SECONDS",
                   help="longest a fetch may wait in the fetcher's own queues (all hosts' "
                        "and its host's turn) before its deadline starts; a longer wait "
                        "ends it queue-timeout (default: %(default)s)")
    p.add_argument("--ignore-robots", action="store_true",
                   help="do not obey robots.txt (only where your policy allows it; "
                        "default: %(default)s)")
    p.add_argument("--operator", metavar="CONTACT",
                   help="who runs the fetcher, put in the User-Agent so site owners can "
                        "reach you: a URL or mailto: address on one line (default: none, "
                        "with a warning)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="cascade",
        description="Put an acceptable-use category on URLs: a calibrated URL model first, "
                    "a sandboxed page fetch only where it pays.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"cascade {__version__}")
    parser.add_argument("--quiet", "-q", action="store_true",
                        help="no progress and no summary on stderr")
    parser.add_argument("--config", metavar="FILE",
                        help="TOML file of settings a team sets once (fetch policy, columns, "
                             "budgets, outputs; docs in cascade/config.py); options given "
                             "on the command line win (default: $CASCADE_CONFIG, else none)")
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
    # None: the URL model's own default (``URL_MODEL_DEFAULTS`` is checked against
    # ``UrlModel``'s signature by a test, so the help cannot drift from the library)
    d = URL_MODEL_DEFAULTS
    p.add_argument("--ngram-min", type=int, default=None,
                   help=f"shortest character n-gram of the URL model (default {d['ngram_min']})")
    p.add_argument("--ngram-max", type=int, default=None,
                   help=f"longest character n-gram (default {d['ngram_max']})")
    p.add_argument("--hash-bits", type=int, default=None,
                   help=f"log2 of the hashing space (default {d['hash_bits']})")
    p.add_argument("--no-tokens", action="store_true", help="character n-grams only")
    p.add_argument("--C", type=float, default=None,
                   help=f"inverse L2 strength of the URL model (default {d['C']:g}; chosen by "
                        "grouped cross-validation, docs/url-model-sweep.md)")
    p.add_argument("--tol", type=float, default=None,
                   help=f"the fit stops when the largest gradient component is below it "
                        f"(default {d['tol']:g})")
    p.add_argument("--max-iter", type=int, default=None,
                   help=f"safety bound on solver iterations; reaching it warns "
                        f"(default {d['max_iter']})")
    p.add_argument("--class-balance", type=float, default=None,
                   help="weight rows by (1 / class frequency) ** this; 0: no weighting "
                        f"(default {d['class_balance']:g})")
    p.add_argument("--seed", type=int, default=0,
                   help="fixes hashing, folds and the holdout; recorded in the model "
                        "(default 0)")
    p.add_argument("--pages", help="folder of saved pages named by the input's 'page' column "
                                   "(default: the input file's folder)")
    p.add_argument("--folds", type=_whole(2), default=4,
                   help="folds for stacking the page model and fusion (default 4)")
    p.add_argument("--fold-case", action="store_true",
                   help="merge labels that differ only in case ('Media sharing', 'Media "
                        "Sharing') into the taxonomy's spelling, else the most common one "
                        "(default: warn and keep them apart)")
    p.add_argument("--absent-categories", choices=["keep", "drop"], default="keep",
                   help="taxonomy categories with no training row: keep them (never "
                        "predicted until rows exist) or drop them from the model; either "
                        "way they are named in a warning (default keep)")
    p.set_defaults(func=cmd_train)

    p = command("score", "Score URLs with a URL model; writes one verdict per URL.")
    p.add_argument("urls", nargs="*", help="URLs to score (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--output", "-o", default="-",
                   help="output file ('-': stdout; .gz ok; default -)")
    p.add_argument("--output-format", choices=["jsonl", "csv"], default=None,
                   help="default: from the output name, else jsonl")
    p.add_argument("--top", type=_whole(1), default=3,
                   help="best categories kept per URL (default 3)")
    p.add_argument("--fetch-below", type=_unit_value, default=0.8,
                   help="mark needs_fetch when confidence is under this (default 0.8)")
    p.set_defaults(func=cmd_score)

    p = command("explain", "Show which URL substrings (and, with --page, which page words) "
                           "drove a verdict (exact, per class).")
    p.add_argument("urls", nargs="+")
    p.add_argument("--page", help="a saved HTML page of the (single) URL: also explain the "
                                  "page model's verdict and show the fused one")
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--top", type=_whole(1), default=8,
                   help="features shown per class (default 8)")
    p.add_argument("--classes", type=_whole(1), default=2,
                   help="most probable classes shown (default 2)")
    p.add_argument("--json", action="store_true", help="JSON Lines instead of text")
    p.set_defaults(func=cmd_explain)

    p = command("evaluate", "Measure a model on a labelled file (metrics as JSON).")
    _add_input(p)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--output", "-o", default="-",
                   help="write the JSON here ('-': stdout; default -)")
    p.add_argument("--pages", help="folder of saved pages named by the input's 'page' column: "
                                   "also evaluate the fused verdict, and flag categories "
                                   "that fusion makes worse")
    _add_precision_target(p)
    p.set_defaults(func=cmd_evaluate)

    p = command("fetch", "Fetch pages through the sandboxed fetcher; one JSON result a URL.")
    p.add_argument("urls", nargs="*", help="URLs to fetch (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--output", "-o", default="-",
                   help="output file, JSON Lines ('-': stdout; .gz ok; default -)")
    _add_fetch_options(p)
    p.add_argument("--text-chars", type=_whole(0), default=2000,
                   help="characters of page text kept in the output (default 2000)")
    p.add_argument("--full-text", action="store_true", help="keep the whole page text")
    p.set_defaults(func=cmd_fetch)

    p = command("refine", "Fetch URLs through the sandboxed fetcher and print fused "
                          "verdicts (URL model + page model); failures keep the URL verdict.")
    p.add_argument("urls", nargs="*", help="URLs to refine (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--output", "-o", default="-",
                   help="output file, JSON Lines ('-': stdout; .gz ok; default -)")
    p.add_argument("--top", type=_whole(1), default=3,
                   help="best categories kept per URL (default 3)")
    p.add_argument("--resume", metavar="PARTIAL",
                   help="skip the URLs already in this earlier output (e.g. the "
                        "out.jsonl.partial an interrupted run kept) and copy its rows into "
                        "the new output first, so the new output is the whole result")
    _add_fetch_options(p)
    p.set_defaults(func=cmd_refine)

    p = command("plan", "Choose which URLs to fetch under a budget: best expected gain per "
                        "unit of cost first; writes the fetch list (one JSON line a URL).")
    p.add_argument("urls", nargs="*", help="URLs to plan (instead of --input)")
    _add_input(p, required=False)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--budget", "-b", required=True,
                   help="most fetches: a number (500) or a share of the URLs (10%% or 0.1)")
    p.add_argument("--budget-bytes", help="also cap expected bytes (e.g. 500MB, 2GiB)")
    p.add_argument("--budget-seconds", help="also cap summed fetch time, in seconds")
    p.add_argument("--fetch-history",
                   help="earlier 'cascade fetch' or 'cascade refine' output (JSON Lines): "
                        "learn per-domain failure rate, bytes and time from it")
    p.add_argument("--min-gain", type=float, default=0.0,
                   help="never fetch a URL whose expected gain is not above this "
                        "(default 0)")
    p.add_argument("--all", action="store_true",
                   help="also write the URLs left out, each with its reason")
    p.add_argument("--output", "-o", default="-",
                   help="the fetch list, JSON Lines ('-': stdout; default -)")
    p.set_defaults(func=cmd_plan)

    p = command("report", "Measure what each fetch budget buys on a labelled file with saved "
                          "pages: HTML report with plots, plus JSON.")
    _add_input(p)
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--pages", help="folder of saved pages named by the input's 'page' column")
    p.add_argument("--output", "-o", "--out", dest="out", required=True,
                   help="folder for report.html, report.json, PNGs")
    p.add_argument("--operating-budget", type=_share_value, default=0.3,
                   help="share of URLs fetched for the 'after' figures: 30%% or 0.3 "
                        "(default 0.3)")
    _add_precision_target(p)
    p.add_argument("--seeds", type=_whole(1), default=5,
                   help="random-order repeats (default 5)")
    p.add_argument("--fetch-history",
                   help="earlier 'cascade fetch' or 'refine' output (JSON Lines): budget rows "
                        "in bytes, seconds and failures measured per domain (default: "
                        "assumed costs, every fetch succeeding, said in the report)")
    p.add_argument("--concurrency", type=_whole(1), default=64,
                   help="fetches in flight, for the wall-clock column (default 64)")
    p.add_argument("--title", default="cascade budget report",
                   help="the report's heading (default: %(default)s)")
    _add_prior_shift(p, "the labelled file's URLs (labels unused)")
    p.set_defaults(func=cmd_report)

    p = command("demo", "Run the whole job on the invented demo scenario into a folder.")
    p.add_argument("--output", "-o", "--out", dest="out", default="demo-output",
                   help="report folder (default demo-output)")
    p.add_argument("--seed", type=int, default=0,
                   help="seed of the invented scenario and of every fit (default 0)")
    p.add_argument("--sites", type=_whole(1), default=2000,
                   help="invented sites (default 2000)")
    p.add_argument("--budget", type=_share_value, default=0.3,
                   help="share of the night's URLs the plan may fetch: 30%% or 0.3 "
                        "(default 0.3)")
    p.set_defaults(func=cmd_demo)

    p = command("night", "The nightly job: read a day's lookup log, refine the uncertain URLs "
                         "within a fetch budget, write verdicts to the store, a review queue "
                         "and a report. Killed, the same command resumes it.")
    p.add_argument("--log", "-l", required=True,
                   help="the lookup log (plain, CSV/TSV, JSON Lines; .gz ok)")
    p.add_argument("--input-format", choices=["txt", "csv", "tsv", "jsonl"],
                   help="override the format guessed from the log's name or first line")
    p.add_argument("--url-column", metavar="NAME",
                   help="the log's column (or JSON key) holding the URL (default: url)")
    p.add_argument("--delimiter", type=_delimiter, metavar="CHAR",
                   help="the log's CSV column separator (default: ',' for CSV, tab for TSV)")
    p.add_argument("--model", "-m", required=True, help="model directory from 'train'")
    p.add_argument("--store", "-s", required=True, help="verdict store (a .sqlite file)")
    p.add_argument("--output", "-o", "--out", dest="out", required=True,
                   help="folder for the changes, review queue, report")
    p.add_argument("--budget", "-b", required=True,
                   help="most fetches: a number (500) or a share of the URLs (10%%)")
    p.add_argument("--budget-bytes", help="also cap bytes (e.g. 500MB, 2GiB)")
    p.add_argument("--budget-seconds", help="also cap summed fetch time, in seconds")
    p.add_argument("--fetch-below", type=_unit_value, default=0.8,
                   help="a URL verdict under this confidence wants a fetch (default 0.8)")
    p.add_argument("--review-size", type=_whole(0), default=500,
                   help="URLs in the analyst review queue (default 500)")
    p.add_argument("--no-history", action="store_true",
                   help="plan without the store's fetch costs and domain history")
    p.add_argument("--run-id", help="default: from the log, the model and the budget, so the "
                                    "same command resumes the same night")
    p.add_argument("--engine", choices=["local", "dask"], default="local",
                   help="fetch here, or on a Dask cluster (pip install -e '.[dask]')")
    p.add_argument("--dask-scheduler", help="address of an existing Dask scheduler "
                                            "(default: a local cluster of 2 processes)")
    _add_prior_shift(p, "the night's URLs")
    _add_fetch_options(p)
    p.set_defaults(func=cmd_night)

    p = command("serve", "Serve decisions over HTTP for a filtering service: the store "
                         "first, then the URL model; URLs worth a fetch are queued for the "
                         "nightly job. Needs the serve extra: pip install -e '.[serve]'.")
    p.add_argument("--model", "-m", required=True, help="model directory (cascade train)")
    p.add_argument("--store", "-s", help="verdict store (.sqlite) to answer from and queue "
                                         "into (default: the model alone)")
    p.add_argument("--create-store", action="store_true",
                   help="start an empty store if --store does not exist")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to bind (default 127.0.0.1; any other needs a token)")
    p.add_argument("--port", type=int, default=8787, help="port (default 8787)")
    p.add_argument("--token-file", help="file whose first line is the bearer token "
                                        "(default: the CASCADE_SERVE_TOKEN variable)")
    p.add_argument("--fetch-below", type=_unit_value, default=0.8,
                   help="a verdict under this confidence is queued for a fetch (default 0.8)")
    p.add_argument("--no-domain-fallback", action="store_true",
                   help="do not answer an unknown URL with its domain's stored verdict")
    p.add_argument("--no-queue", action="store_true",
                   help="do not write URLs worth a fetch to the store's refine queue")
    p.add_argument("--cache-size", type=_whole(0), default=65_536,
                   help="decisions kept in memory (default 65536)")
    p.add_argument("--max-body-bytes", type=_whole(1), default=1 << 20,
                   help="largest request body (default 1048576)")
    p.add_argument("--max-batch", type=_whole(1), default=10_000,
                   help="most URLs in one request (default 10000)")
    p.add_argument("--access-log", action="store_true",
                   help="one JSON line per request on stderr")
    p.set_defaults(func=cmd_serve)

    p = command("config", "Print the settings in effect for a command: each option's value "
                          "and whether it comes from the --config file or the default.")
    p.add_argument("command_name", metavar="COMMAND", choices=[
        "train", "score", "explain", "evaluate", "fetch", "refine", "plan", "report", "demo",
        "night", "serve", "store"], help="the command whose settings to show")
    p.set_defaults(func=cmd_config)

    p = command("store", "Look after the verdict store: export, import, training file, an "
                         "analyst's label, counts.")
    p.add_argument("action", choices=["export", "import", "training", "label", "stats"])
    p.add_argument("--store", "-s", required=True, help="verdict store (a .sqlite file)")
    p.add_argument("--file", "-f", help="file to export to / import from (.jsonl or .csv)")
    p.add_argument("--min-page-confidence", type=float,
                   help="training: also page verdicts at least this confident")
    p.add_argument("--url", help="label: the URL")
    p.add_argument("--category", help="label: its category")
    p.add_argument("--analyst", default="analyst", help="label: who labels")
    p.set_defaults(func=cmd_store)
    return parser


def _nearest_folder(path: Path) -> Path:
    here = path.absolute()
    while not here.exists() and here != here.parent:
        here = here.parent
    return here


def _check_file_target(text: str, option: str) -> None:
    path = Path(text)
    if path.exists() and not path.is_file() and not path.is_dir():  # /dev/stdout, a FIFO
        if not os.access(path, os.W_OK):
            raise UsageError(f"{option} {text}: cannot write to it")
        return
    if path.is_dir():
        raise UsageError(f"{option} {text}: is a folder; give a file name")
    folder = path.parent
    if not folder.is_dir():
        raise UsageError(f"{option} {text}: the folder {folder} does not exist; create it "
                         "first")
    if not os.access(folder, os.W_OK):
        raise UsageError(f"{option} {text}: cannot write in {folder}")


def _check_folder_target(text: str, option: str) -> None:
    path = Path(text)
    if path.exists() and not path.is_dir():
        raise UsageError(f"{option} {text}: exists and is not a folder")
    if not os.access(_nearest_folder(path), os.W_OK):
        raise UsageError(f"{option} {text}: cannot create or write it here")


def _check_model_target(text: str) -> None:
    from cascade.models.model_files import META_FILE

    path = Path(text)
    if path.exists() and not path.is_dir():
        raise UsageError(f"--model {text}: exists and is a file; give a directory to write "
                         "the model to")
    if path.is_dir() and not (path / META_FILE).exists() and any(path.iterdir()):
        raise UsageError(f"--model {text}: exists and is not a model directory; refusing to "
                         "overwrite it (give a new or an empty directory)")
    if not os.access(_nearest_folder(path.parent if not path.exists() else path), os.W_OK):
        raise UsageError(f"--model {text}: cannot write there")


def _preflight(args: argparse.Namespace) -> None:
    """Check the options and every output path before any work: a fit or a night must not
    run for minutes and then fail on a path or an option."""
    if getattr(args, "urls", None) and getattr(args, "input", None):
        raise UsageError(f"give URLs on the command line or --input {args.input}, not both "
                         f"({len(args.urls)} URL(s) given)")
    output = getattr(args, "output", None)
    if isinstance(output, str) and output != "-" and args.command != "store":
        _check_file_target(output, "--output")
    out = getattr(args, "out", None)
    if isinstance(out, str):
        _check_folder_target(out, "--output")
    if args.command == "train":
        _check_model_target(args.model)


def _on_sigterm(signum: int, frame: Any) -> None:
    raise Terminated


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


#: Commands a config file never reaches (the demo runs on its embedded defaults), and keys
#: it never sets for a command (a config must not choose where ``train`` writes a model).
_CONFIG_SKIPS_COMMANDS = {"demo", "config"}
_CONFIG_SKIPS_KEYS = {"train": {"model", "output", "out"}}


def _apply_config(parser: argparse.ArgumentParser, settings: dict[str, Any],
                  command: str | None) -> tuple[dict[str, Any], set[str]]:
    """Make the file's settings the defaults of ``command`` (the one being run), so the
    command line still wins; list options (``--resolve``, ``--allow-network``, ``--port``)
    are returned instead, to be used only when the command line gives none (argparse would
    add the command line's to them). Values are checked only for that command. Also
    returns the options the file set."""
    later: dict[str, Any] = {}
    subs = _subparsers(parser)
    if command is None or command in _CONFIG_SKIPS_COMMANDS or command not in subs:
        return later, set()
    sub = subs[command]
    values = {}
    for action in sub._actions:
        dest = action.dest
        if dest not in settings or not action.option_strings or \
                dest in _CONFIG_SKIPS_KEYS.get(command, ()):
            continue
        value = settings[dest]
        is_list = isinstance(action, argparse._AppendAction)
        if isinstance(value, list) != is_list:
            continue  # e.g. [fetch] port (a list) is not serve's one --port
        convert = action.type or (lambda v: v)
        try:
            if is_list:
                value = [convert(v) if isinstance(v, str) else v for v in value]
            elif isinstance(action, argparse._StoreTrueAction):
                if not isinstance(value, bool):
                    raise ValueError(f"true or false (a TOML boolean), not {value!r}")
            elif isinstance(value, str) or action.type is not None:
                value = convert(value if isinstance(value, str) else str(value))
        except (argparse.ArgumentTypeError, ValueError) as exc:
            raise UsageError(f"--config: {dest}: {exc}") from None
        if action.choices is not None and value not in action.choices:
            raise UsageError(f"--config: {dest} must be one of {list(action.choices)}, not "
                             f"{value!r}")
        action.required = False  # the file gave it
        if is_list:
            later[dest] = value
        else:
            values[dest] = value
    if values:
        sub.set_defaults(**values)
    return later, set(values) | set(later)


def _command_in(argv: Sequence[str]) -> str | None:
    """The command word of an argument list (after the global options)."""
    items = list(argv)
    i = 0
    while i < len(items):
        token = items[i]
        if token == "--config":
            i += 2
            continue
        if not token.startswith("-"):
            return token
        i += 1
    return None


def cmd_config(args: argparse.Namespace) -> int:
    """The settings in effect for one command: each option's value and where it came from
    (the command line, the config file, or the built-in default)."""
    parser = build_parser()
    settings = load_settings(args.config)
    later, applied = _apply_config(parser, settings, args.command_name)
    target = _subparsers(parser)[args.command_name]
    out: dict[str, Any] = {"config_file": _config_path(args.config), "command":
                           args.command_name, "options": {}}
    for action in target._actions:
        if not action.option_strings or action.dest in ("help", "quiet"):
            continue
        out["options"][action.option_strings[0]] = {
            "value": later.get(action.dest, action.default),
            "from": "config file" if action.dest in applied else "default"}
    print(json.dumps(out, indent=2, default=str))
    return EXIT_OK


def _config_path(given: str | None) -> str | None:
    return given or os.environ.get("CASCADE_CONFIG") or None


def load_settings(given: str | None) -> dict[str, Any]:
    from cascade.config import load_config

    path = _config_path(given)
    return load_config(path) if path else {}


def main(argv: Sequence[str] | None = None) -> int:
    """Run one command; returns its exit code (``EXIT_CODES``), never raises for the
    user's mistakes."""
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    pre = argparse.ArgumentParser(add_help=False)
    pre.add_argument("--config")
    known, _ = pre.parse_known_args(argv)
    try:
        later, _ = _apply_config(parser, load_settings(known.config), _command_in(argv))
    except UsageError as exc:
        _eprint(f"cascade: error: {exc}")
        return EXIT_USAGE
    args = parser.parse_args(argv)
    for dest, value in later.items():  # list options: the file's only if none were given
        if getattr(args, dest, None) is None:
            setattr(args, dest, value)
    if not hasattr(args, "quiet"):
        args.quiet = False
    previous = None
    try:  # SIGTERM unwinds like Ctrl-C (only the main thread may set a handler)
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:
        previous = None
    try:
        _preflight(args)
        return int(args.func(args))
    except KeyboardInterrupt as exc:
        code = EXIT_TERMINATED if isinstance(exc, Terminated) else EXIT_INTERRUPTED
        how = "stopped by SIGTERM" if code == EXIT_TERMINATED else "interrupted"
        _eprint(f"cascade {args.command}: {how} (exit {code})")
        for path, rows in getattr(exc, "partial_outputs", []):
            how_on = (f"run the same command with --resume {path} to refine only the rest "
                      "(its rows are copied into the new output)" if args.command == "refine"
                      else
                      "run the command again for the whole output")
            _eprint(f"cascade {args.command}: the {rows} rows written so far are kept in "
                    f"{path} (each with its input line number, 'line'); {how_on}")
        return code
    except BrokenPipeError:
        return EXIT_OK
    except Exception as exc:  # noqa: BLE001 - every error becomes an exit code here
        code = exit_code_for(exc)
        if code == EXIT_BUG:
            _eprint("".join(traceback.format_exception(exc)).rstrip())
            _eprint(f"cascade {args.command}: internal error ({type(exc).__name__}: {exc}). "
                    "This is a bug in cascade, not in your input: please report it with the "
                    "traceback above.")
        else:
            _eprint(f"cascade {args.command}: error: {exc}")
        return code
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
