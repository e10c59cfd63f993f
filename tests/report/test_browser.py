"""The report opens in a real browser (headless Chromium, no network) and everything in it has drawn."""

from __future__ import annotations

import re
from pathlib import Path

from PIL import Image

from .dom import ARTIFACTS, Node, parse, render
from .studies import analyze_json

# Okabe-Ito "blue" (#0072B2): the forest plots' site markers and the sensitivity card's edge.
OKABE_ITO_BLUE = (0x00, 0x72, 0xB2)


def _svg_drawn(figure: Node) -> list[str]:
    """Problems with one figure's SVG: missing, or without a path that has drawing commands."""
    svgs = list(figure.iter("svg"))
    if not svgs:
        return [f"{figure.attrs.get('id')}: no <svg>"]
    paths = [p for p in svgs[0].iter("path") if re.search(r"[MLCQZmlcqz]", p.attrs.get("d", ""))]
    uses = list(svgs[0].iter("use"))  # matplotlib draws repeated markers as <use> of one <path>
    if not paths:
        return [f"{figure.attrs.get('id')}: <svg> has no path"]
    if len(paths) + len(uses) < 5:
        return [f"{figure.attrs.get('id')}: <svg> has only {len(paths) + len(uses)} drawn elements"]
    return []


def test_report_has_no_external_reference(demo_report: Path) -> None:
    html = demo_report.read_text(encoding="utf-8")
    tree = parse(html)
    for node in tree.iter():
        for attribute in ("src", "href", "xlink:href", "action"):
            value = node.attrs.get(attribute, "")
            assert not re.match(r"(?i)\s*(https?:|//|ftp:|file:)", value), f"<{node.tag} {attribute}={value[:60]}>"
    assert not list(tree.iter("script")), "the report must not need scripts"
    assert not list(tree.iter("link")), "no external stylesheet or font"
    assert not re.search(r"(?i)@import|url\(\s*['\"]?(https?:|//)", html)
    # The page forbids fetching anything beyond its own inline styles and data: URIs.
    csp = next(n for n in tree.iter("meta") if n.attrs.get("http-equiv") == "Content-Security-Policy")
    assert "default-src 'none'" in csp.attrs["content"]


def test_demo_report_renders_in_chromium_with_key_numbers(demo_store: Path, demo_report: Path) -> None:
    screenshot = ARTIFACTS / "report-demo.png"
    dom = parse(render(demo_report, screenshot, height=16000))
    analysis = analyze_json(demo_store)
    pooled = analysis["pooled"]

    summary = dom.find_id("summary")
    assert summary is not None
    text = " ".join(summary.text().split())
    for name in ("sensitivity", "specificity"):
        entry = pooled[name]
        assert f"{100 * entry['estimate']:.1f}%" in text, name
        assert f"{100 * entry['ci_low']:.1f}% to {100 * entry['ci_high']:.1f}%" in text, name
    n_pooled, n_sites = len(pooled["sites_pooled"]), len(analysis["sites"])
    assert f"{n_pooled} of {n_sites} sites with a release were pooled" in text
    # The demo's design: skarrow-specialist's cells are all withheld; the headline pools it through censoring.
    assert n_pooled == 8 and n_sites == 8 and pooled["censored_sites"] == ["skarrow-specialist"]

    figures = [n for n in dom.iter("figure") if "plot" in n.classes()]
    ids = {f.attrs["id"] for f in figures}
    assert {"fig-forest-sensitivity", "fig-forest-specificity"} <= ids
    problems = [p for f in figures for p in _svg_drawn(f)]
    assert not problems, problems

    # The browser painted: the screenshot is the requested size and carries the plots' blue.
    image = Image.open(screenshot).convert("RGB")
    assert image.size == (1200, 16000)
    colours = image.getcolors(maxcolors=1 << 20)
    assert colours is not None
    blue = sum(
        count for count, rgb in colours if all(abs(a - b) <= 6 for a, b in zip(rgb, OKABE_ITO_BLUE, strict=True))
    )
    assert blue > 500, f"only {blue} pixels of the plots' blue: did the SVGs draw?"


def test_extended_report_renders_every_section_in_chromium(extended_report: tuple[Path, dict]) -> None:
    out, info = extended_report
    dom = parse(render(out, ARTIFACTS / "report-extended.png", height=24000))
    sections = {n.attrs.get("id") for n in dom.iter("section")}
    expected = {"summary", "flow", "forest", "methods", "cautions", "provenance"}
    expected |= {f"analysis-{name}" for name in ("roc", "calibration", "margin", "subgroups", "agreement")}
    assert expected <= sections, expected - sections
    assert {f"analysis-{name}" for name in ("roc", "calibration", "margin", "subgroups", "agreement")} <= set(
        info["sections"]
    )
    figures = [n for n in dom.iter("figure") if "plot" in n.classes()]
    assert len(figures) >= 2
    problems = [p for f in figures for p in _svg_drawn(f)]
    assert not problems, problems
