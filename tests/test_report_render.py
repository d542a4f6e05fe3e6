"""The HTML budget report renders in headless Chromium: every plot is shown, nothing fails
to load, nothing is fetched from elsewhere, and a real screenshot is written. Skipped where
no Chromium is installed (Debian: ``apt-get install chromium``)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

from cascade.report import build_report, write_report
from tests.test_budget import _synthetic

SCRIPT = Path(__file__).resolve().parent.parent / "benchmarks" / "report_screenshot.py"


def _load_script():
    """benchmarks/ is not a package: import the script's module from its path."""
    spec = importlib.util.spec_from_file_location("report_screenshot", SCRIPT)
    assert spec and spec.loader
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


shot = _load_script()
needs_chromium = pytest.mark.skipif(shot.find_chromium() is None,
                                reason="Chromium not installed (apt-get install chromium)")


@needs_chromium
def test_report_renders_every_plot_with_no_errors(tmp_path) -> None:
    y, pu, pf = _synthetic(400, k=4, seed=3)
    gain = 1.0 - pu.max(axis=1)
    # categories of different costs: the cost-weighted error plot is drawn too
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=2,
                       costs=[1.0, 2.0, 1.0, 4.0])
    html_path = write_report(rep, tmp_path / "r")["html"]
    png = tmp_path / "report.png"
    result = shot.check_report(html_path, png, timeout=45)
    assert result["errors"] == []
    assert result["images_found"] == 5 and result["images_rendered"] == 5
    assert result["figures"] == ["budget-accuracy", "budget-error", "risk-coverage", "roc",
                                 "reliability"]
    assert result["ok"] is True
    data = png.read_bytes()
    assert data[:8] == shot.PNG_SIGNATURE
    assert len(data) > 20_000 and result["png_bytes"] == len(data)


@needs_chromium
def test_check_catches_an_external_load_and_a_broken_image(tmp_path) -> None:
    # The checker itself: a page that reaches outside and shows a broken plot must fail.
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><head><meta charset="utf-8">'
                    '<link rel="stylesheet" href="https://cdn.invalid/x.css"></head><body>'
                    '<figure id="broken"><img src="data:image/png;base64,AAAA"></figure>'
                    "</body></html>", encoding="utf-8")
    result = shot.check_report(page, tmp_path / "bad.png", timeout=45)
    assert result["ok"] is False
    assert result["images_found"] == 1 and result["images_rendered"] == 0
    assert any("cdn.invalid" in e for e in result["errors"])


def test_instrument_keeps_the_charset_first() -> None:
    out = shot.instrument('<html><head><meta charset="utf-8"><title>t</title></head></html>')
    assert out.index('<meta charset="utf-8">') < out.index("Content-Security-Policy")
    assert out.count(shot.VERDICT_ID) == 1
