"""Screenshot-quality check of the HTML budget report in headless Chromium.

    python benchmarks/report_screenshot.py --png out/report.png [--json out/report.json]
    python benchmarks/report_screenshot.py --html out/report/report.html --png out/report.png

Opens an instrumented temporary copy of the report (the original is never changed) in
headless Chromium, saves a full-page PNG and reads back a JSON verdict that a small injected
script writes into the DOM once the page has loaded: how many ``<img>`` there are, how many
decoded and are shown at a non-zero size, every window error, every resource the page asked
for (the report is self-contained, so it must ask for none), and every Content Security
Policy violation. Chromium also runs with every host name mapped to "not found", so a
request that slipped through would fail rather than reach the network. Console messages
(from Chromium's stderr log) count as errors too: the report has no scripts of its own.

Prints one JSON object; exits 1 if any check fails. Without a Chromium binary it prints
``{"skipped": ...}`` and exits 0, or 2 with ``--require``. Without ``--html`` it builds a
report from synthetic data (as tests/test_report.py does) in a temporary folder.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
VERDICT_ID = "cascade-render-verdict"
CANDIDATES = ("chromium", "chromium-browser", "google-chrome")
MAX_HEIGHT = 16384  # tallest window asked for when the page is longer than --window

# Switches: https://peter.sh/experiments/chromium-command-line-switches/ and Chromium's
# headless docs (--screenshot, --dump-dom, --virtual-time-budget, --window-size).
BASE_FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-extensions", "--no-first-run", "--hide-scrollbars",
    "--disable-component-update", "--disable-sync", "--no-default-browser-check",
    "--host-resolver-rules=MAP * ~NOTFOUND",  # any host name fails to resolve
    "--enable-logging=stderr", "--v=0",  # console messages appear as "CONSOLE" log lines
)

# Only inline styles, inline scripts (ours) and data: images may load; anything else is
# blocked and reported through the "securitypolicyviolation" event (W3C CSP Level 3).
CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
       "script-src 'unsafe-inline'; font-src data:")

# Injected first in <head>. The verdict is written synchronously in the load handler: the load
# event waits for every image (WHATWG HTML, "the img element": complete / naturalWidth), while
# anything asynchronous after it (e.g. img.decode()) can lose the race with --dump-dom once
# the virtual time budget has run out. performance.getEntriesByType("resource") is W3C
# Resource Timing, which lists failed fetches too.
PROBE = """<meta http-equiv="Content-Security-Policy" content="__CSP__">
<script>(function(){
var errors=[];
window.addEventListener("error",function(e){var t=e.target;
 errors.push(t&&t!==window?"failed to load <"+t.tagName.toLowerCase()+"> "+(t.src||t.href||"")
 :"error: "+e.message+" at "+e.filename+":"+e.lineno);},true);
window.addEventListener("unhandledrejection",function(e){errors.push("rejection: "+e.reason);});
document.addEventListener("securitypolicyviolation",function(e){
 errors.push("blocked by CSP: "+e.blockedURI+" ("+e.effectiveDirective+")");});
window.addEventListener("load",function(){
 var shown=Array.prototype.map.call(document.images,function(i){
  var r=i.getBoundingClientRect(),s=getComputedStyle(i);
  return {figure:(i.closest("figure")||{}).id||null,natural:[i.naturalWidth,i.naturalHeight],
   shown:[Math.round(r.width),Math.round(r.height)],
   ok:i.complete&&i.naturalWidth>0&&r.width>0&&r.height>0&&
    s.visibility!=="hidden"&&s.display!=="none"};});
 var res=performance.getEntriesByType("resource").map(function(r){return r.name;})
  .filter(function(u){return !/^(data|blob):/.test(u);});
 var b=document.body,v=document.createElement("script");
 v.type="application/json";v.id="__VERDICT_ID__";
 v.textContent=JSON.stringify({images:shown,errors:errors,resources:res,
  page_height:Math.ceil(b.getBoundingClientRect().bottom+scrollY
   +parseFloat(getComputedStyle(b).marginBottom)),
  page_width:document.documentElement.scrollWidth,viewport_width:innerWidth})
  .replace(/</g,"\\\\u003c");
 document.body.appendChild(v);});
})();</script>
""".replace("__CSP__", CSP).replace("__VERDICT_ID__", VERDICT_ID)

_CONSOLE = re.compile(r':CONSOLE[:(]\d+\)?\] "(.*)", source: (.*)$', re.M)
_EXTERNAL = re.compile(r"""(?:src|href)\s*=\s*["']?\s*(?:https?:)?//|url\(\s*["']?(?:https?:)?//""",
                       re.I)


def find_chromium(explicit: str | None = None) -> str | None:
    """Path of a Chromium/Chrome binary: ``explicit``, else the first of CANDIDATES on PATH,
    else /usr/bin/chromium; None when there is none (the check is then skipped)."""
    if explicit:
        return explicit if shutil.which(explicit) or Path(explicit).is_file() else None
    for name in CANDIDATES:
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").is_file() else None


def chromium_version(binary: str, timeout: float = 20) -> str:
    """``binary --version`` as printed (e.g. "Chromium 120.0.6099.224 built on Debian ...")."""
    try:
        out = subprocess.run([binary, "--version"], capture_output=True, text=True,
                             timeout=timeout, check=False).stdout
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"unknown ({exc.__class__.__name__})"
    return out.strip() or "unknown"


def instrument(page: str) -> str:
    """The report's HTML with PROBE inserted right after ``<meta charset>`` (so the charset
    stays within the first 1024 bytes), else after ``<head>``, else at the start."""
    for pattern in (r"<meta\s+charset=[^>]*>", r"<head[^>]*>"):
        m = re.search(pattern, page, re.I)
        if m:
            return page[:m.end()] + PROBE + page[m.end():]
    return PROBE + page


def _run(cmd: list[str], timeout: float) -> tuple[int | None, str, str]:
    """Run Chromium in its own process group; on timeout kill that group (its renderer and
    GPU children too). Returns (exit code or None on timeout, stdout, stderr)."""
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            errors="replace", start_new_session=True)
    try:
        out, err = proc.communicate(timeout=timeout)
        return proc.returncode, out, err
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        out, err = proc.communicate()
        return None, out, err


def _chromium(binary: str, url: str, png: Path, size: tuple[int, int], budget_ms: int,
              timeout: float, profile: Path) -> tuple[int | None, str, str]:
    cmd = [binary, *BASE_FLAGS, f"--user-data-dir={profile}",
           f"--window-size={size[0]},{size[1]}", f"--virtual-time-budget={budget_ms}",
           f"--screenshot={png}", "--dump-dom", url]
    return _run(cmd, timeout)


def check_report(html_path: str | Path, png_path: str | Path, *, chromium: str | None = None,
                 window: tuple[int, int] = (1280, 6000), budget_ms: int = 5000,
                 timeout: float = 60) -> dict[str, Any]:
    """Render ``html_path`` in headless Chromium, save a PNG to ``png_path`` and return the
    verdict (``ok`` is True when every check passed; ``skipped`` when there is no browser)."""
    t0 = time.perf_counter()
    binary = find_chromium(chromium)
    if binary is None:
        return {"skipped": "no chromium binary (looked for " + ", ".join(CANDIDATES)
                + " on PATH and /usr/bin/chromium)", "ok": None}
    html_path, png = Path(html_path).resolve(), Path(png_path).resolve()
    png.parent.mkdir(parents=True, exist_ok=True)
    png.unlink(missing_ok=True)
    page = html_path.read_text(encoding="utf-8")
    errors: list[str] = [f"external reference in the HTML: {m.group(0)}"
                         for m in _EXTERNAL.finditer(page)]
    verdict: dict[str, Any] = {}
    console: list[str] = []
    with tempfile.TemporaryDirectory(prefix="cascade-shot-") as tmp:
        copy = Path(tmp) / "report.html"
        copy.write_text(instrument(page), encoding="utf-8")
        size = window
        for _attempt in range(2):
            code, out, err = _chromium(binary, copy.as_uri(), png, size, budget_ms, timeout,
                                       Path(tmp) / "profile")
            if code is None:
                errors.append(f"chromium timed out after {timeout:g} s")
                break
            if code != 0:
                errors.append(f"chromium exited {code}: {err.strip()[-500:]}")
                break
            console = [f"console: {m.group(1)} ({m.group(2)})" for m in _CONSOLE.finditer(err)]
            m = re.search(rf'<script type="application/json" id="{VERDICT_ID}">(.*?)</script>',
                          out, re.S)
            if not m:
                errors.append("no verdict in the DOM: the load event never fired in time")
                break
            verdict = json.loads(m.group(1))
            # The PNG is the window height of page (innerHeight is a little less in
            # new headless), so the page must fit within size[1] CSS pixels.
            height = int(verdict.get("page_height", 0))
            if height <= size[1] or size[1] >= MAX_HEIGHT:
                break
            size = (size[0], min(height, MAX_HEIGHT))  # page longer than the window: again
    images = verdict.get("images", [])
    errors += verdict.get("errors", []) + console
    errors += [f"resource requested: {u}" for u in verdict.get("resources", [])]
    if verdict and verdict.get("page_width", 0) > verdict.get("viewport_width", 0):
        errors.append(f"horizontal overflow: page {verdict['page_width']} px wide, "
                      f"window {verdict['viewport_width']} px")
    if verdict.get("page_height", 0) > size[1]:
        errors.append(f"screenshot cut: page {verdict['page_height']} px, window {size[1]} px")
    for im in images:
        if not im["ok"]:
            errors.append(f"image not shown: figure {im['figure']}, natural {im['natural']}, "
                          f"shown {im['shown']}")
    data = png.read_bytes() if png.is_file() else b""
    if not data.startswith(PNG_SIGNATURE):
        errors.append("no PNG screenshot written")
    rendered = sum(1 for im in images if im["ok"])
    return {
        "ok": not errors and bool(images) and rendered == len(images),
        "images_found": len(images), "images_rendered": rendered, "errors": errors,
        "screenshot": str(png), "png_bytes": len(data),
        "window": f"{size[0]}x{size[1]}", "page_height": verdict.get("page_height"),
        "figures": [im["figure"] for im in images],
        "chromium": chromium_version(binary), "seconds": round(time.perf_counter() - t0, 2),
    }


def synthetic_report(out_dir: str | Path) -> Path:
    """Write a report built from synthetic data (tests.test_budget._synthetic, as in
    tests/test_report.py) into ``out_dir``; return the path of its report.html."""
    import numpy as np

    if str(ROOT) not in sys.path:
        sys.path.insert(0, str(ROOT))
    from cascade.report import build_report, write_report
    from tests.test_budget import _synthetic

    y, pu, pf = _synthetic(800, k=4, seed=7)
    gain = 1.0 - pu.max(axis=1) + np.random.default_rng(0).normal(0, 0.05, len(y))
    counts = np.random.default_rng(2).integers(1, 100, len(y))
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], counts=counts, seeds=2,
                       context={"data": "synthetic (tests.test_budget._synthetic)"})
    return write_report(rep, out_dir)["html"]


def main(argv: list[str] | None = None) -> int:
    """Command line: print the verdict as one JSON line; exit 0 (pass or skipped), 1 (fail),
    2 (no Chromium and --require)."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--html", help="a written report.html (default: build a synthetic one)")
    ap.add_argument("--png", required=True, help="where to save the screenshot")
    ap.add_argument("--chromium", help="browser binary (default: looked up on PATH)")
    ap.add_argument("--window", default="1280x6000", help="WIDTHxHEIGHT in CSS pixels")
    ap.add_argument("--budget-ms", type=int, default=5000, help="virtual time budget")
    ap.add_argument("--timeout", type=float, default=60, help="seconds per Chromium run")
    ap.add_argument("--require", action="store_true", help="fail when Chromium is missing")
    ap.add_argument("--json", help="write the verdict here too")
    args = ap.parse_args(argv)
    width, height = (int(v) for v in args.window.lower().split("x"))
    with tempfile.TemporaryDirectory(prefix="cascade-report-") as tmp:
        html_path = Path(args.html) if args.html else synthetic_report(tmp)
        result = check_report(html_path, args.png, chromium=args.chromium,
                              window=(width, height), budget_ms=args.budget_ms,
                              timeout=args.timeout)
    print(json.dumps(result))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    if "skipped" in result:
        return 2 if args.require else 0
    return 0 if result["ok"] else 1


if __name__ == "__main__":
    raise SystemExit(main())
