"""The review report end to end: files written by ``loopvet check``, reproducible bytes,
escaping of record text, JUnit XML, the Markdown summary, ``--no-html``, and a real headless
Chromium reading the rendered pages (figures drawn, sorting and filtering, no console
errors, a record title holding ``<script>`` shown as text).

The browser test needs Debian's ``chromium`` (``.ci/run`` installs it): it is skipped where
the browser is missing, except under CI (CI=true), where a missing browser fails the test.
Its screenshots stay in ``reports/browser-test/screenshots/`` for people to look at.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from loopvet.analysis.curves import ENVELOPE_SAMPLES, _r5s, r5

from .cdp import Browser, find_chromium
from .conftest import ROOT

#: a title that would run script if any renderer forgot to escape it
NASTY = ('<script>window.__lv_pwned = 1</script><img src=x onerror="window.__lv_pwned = 2">'
         ' & "quotes" | `ticks`')
TRICKY = """\
loopvet: 1
name: tricky-title
revision: {revision}
title: '{title}'
notes: "approved as plain"
plant: {{transfer: "1/((s+1)*(0.2*s+1))"}}
controller: {{pid: {{kp: {kp}, ki: 1.0}}}}
gain: {{nominal: 1, range: [0.5, 2]}}
requirements:
  stability: {{over_gain: true}}
  phase_margin_deg: {{min: 40}}
  sensitivity_peak: {{max: 1.8}}
"""
BROKEN = "loopvet: 1\nname: broken\nrevision: yes\nplant: {transfer: '1/(s+1)'}\n"
OUT = ROOT / "reports" / "browser-test"


def _cli(*args: str, cwd: Path, epoch: str = "1700000000") -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SOURCE_DATE_EPOCH": epoch,
           "PYTHONPATH": str(ROOT / "src") + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.run([sys.executable, "-m", "loopvet", *args], capture_output=True,
                          text=True, cwd=cwd, env=env, timeout=300)


def _approved_steam_record() -> str:
    stored = json.loads((ROOT / "reports" / "baseline.json").read_text())
    return "\n".join(stored["designs"]["steam-header-pressure"]["record_lines"])


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, Path]:
    """A small fleet approved, then changed, checked twice: (work folder, run A, run B).

    Approved: the demo steam header at r3, a fast loop with a plain title, the failing
    fermentation tank and the swept cold store. Then the steam header becomes r4 (the
    demo's retune), the fast loop gets a title full of markup (r2), and a broken record
    with a file name full of markup joins. Run A writes to reports/browser-test/."""
    work = tmp_path_factory.mktemp("report")
    fleet = work / "fleet"
    fleet.mkdir()
    (fleet / "steam-header-pressure.yaml").write_text(_approved_steam_record())
    (fleet / "tricky-title.yaml").write_text(TRICKY.format(revision=1, title="Plain title",
                                                           kp=2.0))
    for name in ("thermal/fermentation-tank-3-temp.yaml", "thermal/cold-store-air-temp.yaml"):
        shutil.copy(ROOT / "designs" / name, fleet / Path(name).name)
    done = _cli("approve", "fleet", "--baseline", "baseline.json", "--by", "test",
                "--accept-failing", "--jobs", "1", cwd=work)
    assert done.returncode == 0, done.stderr
    shutil.copy(ROOT / "designs" / "utilities" / "steam-header-pressure.yaml",
                fleet / "steam-header-pressure.yaml")
    (fleet / "tricky-title.yaml").write_text(TRICKY.format(
        revision=2, title=NASTY.replace("'", "''"), kp=2.6))
    (fleet / "bad<b>&'name.yaml").write_text(BROKEN)
    shutil.rmtree(OUT, ignore_errors=True)
    outputs = []
    for out, epoch in ((OUT, "1700000000"), (work / "b", "1800000000")):
        done = _cli("check", "fleet", "--baseline", "baseline.json", "--out", str(out),
                    "--jobs", "2", cwd=work, epoch=epoch)
        assert done.returncode == 3, done.stdout + done.stderr
        assert f"report in {out / 'index.html'}" in done.stderr
        outputs.append(out)
    return work, outputs[0], outputs[1]


def _html_files(out: Path) -> list[Path]:
    return sorted([out / "index.html", *(out / "pages").glob("*.html")])


def test_every_report_file_is_written(runs):
    _, a, _ = runs
    for name in ("results.json", "junit.xml", "summary.md", "index.html"):
        assert (a / name).is_file(), name
    pages = sorted(p.name for p in (a / "pages").glob("*.html"))
    assert pages == ["bad-b-name.html", "cold-store-air-temp.html",
                     "fermentation-tank-3-temp.html", "steam-header-pressure.html",
                     "tricky-title.html"]


def test_same_inputs_give_the_same_bytes_but_the_stamp_line(runs):
    _, a, b = runs
    for name in ("results.json", "junit.xml", "summary.md"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    for page in _html_files(a):
        old = page.read_text().splitlines()
        new = (b / page.relative_to(a)).read_text().splitlines()
        differ = [i for i, (x, y) in enumerate(zip(old, new, strict=True)) if x != y]
        assert len(old) == len(new) and len(differ) == 1, page.name
        assert "2023-11-14 22:13:20 UTC" in old[differ[0]], old[differ[0]]
        assert "loopvet 0." in old[differ[0]] and 'class="stamp"' in old[differ[0]]


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.ids: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.ids += [v for k, v in attrs if k == "id" and v]


def test_record_text_is_escaped_and_ids_are_unique(runs):
    _, a, _ = runs
    for page in _html_files(a):
        text = page.read_text()
        assert "<img src=x" not in text and "__lv_pwned = 1</script>" not in text, page.name
        parsed = _Collect()
        parsed.feed(text)
        assert len(parsed.ids) == len(set(parsed.ids)), page.name
        assert parsed.tags.count("script") == (1 if page.name == "index.html" else 0)
        assert "<link" not in text and "http://" not in text.replace(
            "http://www.w3.org/", ""), page.name
    tricky = (a / "pages" / "tricky-title.html").read_text()
    assert "&lt;script&gt;window.__lv_pwned = 1&lt;/script&gt;" in tricky
    index = (a / "index.html").read_text()
    assert "bad&lt;b&gt;&amp;&#39;name" in index


def test_design_page_carries_table_diff_facts_and_figures(runs):
    _, a, _ = runs
    page = (a / "pages" / "steam-header-pressure.html").read_text()
    for fragment in ('id="fig-locus"', 'id="fig-frequency"', 'id="fig-nyquist"',
                     'id="fig-responses"', "r3 → r4", "controller factored gain: 1.4 -&gt; 1.0",
                     "phase margin", "−4.592", "approved r3", "Stability crossings",
                     "supports, and never replaces, qualified engineering review"):
        assert fragment in page, fragment
    assert 'id="fig-sweep"' in (a / "pages" / "cold-store-air-temp.html").read_text()


def test_results_carry_the_curves_the_figures_draw(runs):
    _, a, _ = runs
    data = json.loads((a / "results.json").read_text())
    by = {d["name"]: d for d in data["designs"]}
    steam = by["steam-header-pressure"]
    resp = steam["frequency"]["response"]
    assert 200 <= len(resp["w"]) <= 320 and len(resp["phase_deg"]) == len(resp["w"])
    assert all(len(f"{x:.6g}".lstrip("-").replace(".", "").lstrip("0")) <= 5
               for x in resp["magnitude_db"][:50])
    crossover = steam["frequency"]["gain_crossovers"][0]
    assert crossover["critical_phase_deg"] == -180.0
    assert crossover["phase_deg"] - crossover["critical_phase_deg"] == pytest.approx(
        steam["metrics"]["phase_margin_deg"], abs=0.01)
    curves = steam["baseline"]["curves"]
    assert curves["revision"] == 3 and curves["branches"]["positive"]["gains"]
    assert curves["frequency"]["response"]["w"] and curves["responses"]["reference"]["y"]
    sweep = by["cold-store-air-temp"]["sweep"]
    assert sweep["envelope"]["samples"] == ENVELOPE_SAMPLES
    low, high = sweep["envelope"]["reference"]["low"], sweep["envelope"]["reference"]["high"]
    assert all(lo <= hi for lo, hi in zip(low, high, strict=True))
    assert sweep["scatter"]["parameter"] in sweep["scatter"]["influence"]
    assert "curves" not in by["cold-store-air-temp"]["baseline"]       # unchanged record


def test_junit_has_a_suite_per_design_and_a_case_per_requirement(runs):
    _, a, _ = runs
    root = ET.parse(a / "junit.xml").getroot()
    suites = {s.get("name"): s for s in root.iter("testsuite")}
    assert set(suites) == {"steam-header-pressure", "tricky-title", "fermentation-tank-3-temp",
                           "cold-store-air-temp", "bad<b>&'name"}
    ferment = suites["fermentation-tank-3-temp"]
    failure = ferment.find("testcase[@name='stability (nominal)']/failure")
    assert failure is not None and "unstable" in failure.get("message", "")
    steam = suites["steam-header-pressure"]
    drift = steam.find("testcase[@name='approved baseline (r3)']/failure")
    assert drift is not None and "phase_margin_deg" in (drift.text or "")
    assert suites["bad<b>&'name"].find("testcase/error") is not None
    assert int(root.get("failures", "0")) >= 2 and root.get("errors") == "1"
    assert suites["tricky-title"].find("properties/property[@name='title']").get(
        "value") == NASTY


def test_markdown_summary_is_compact_and_inert(runs):
    _, a, _ = runs
    text = (a / "summary.md").read_text()
    assert text.startswith("### loopvet: exit 3")
    assert "| status | loop | revision | tightest requirement | headroom | since approval |" \
        in text
    steam = next(line for line in text.splitlines() if "steam-header-pressure" in line)
    assert "r3 → r4" in steam and "**degraded" in steam
    assert "<script" not in text and "<b>" not in text
    assert "qualified engineering review" in text


def test_no_html_removes_an_earlier_report(runs, tmp_path):
    work, _, b = runs
    out = tmp_path / "out"
    shutil.copytree(b, out)
    done = _cli("check", "fleet/fermentation-tank-3-temp.yaml", "--no-baseline", "--no-html",
                "--out", str(out), cwd=work)
    assert done.returncode == 1, done.stderr
    assert not (out / "index.html").exists() and not list((out / "pages").glob("*.html"))
    assert (out / "junit.xml").is_file() and (out / "summary.md").is_file()
    assert "report in" not in done.stderr


# ---------------------------------------------------------------------------- browser

def _browser() -> str:
    exe = find_chromium()
    if exe is None:
        message = "headless Chromium not found (apt-get install chromium, or LOOPVET_CHROMIUM)"
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(message + "; CI must run the browser test")
        pytest.skip(message)
    return exe


def _order(b: Browser, field: str) -> list[str]:
    return b.js(f"Array.from(document.querySelectorAll('#fleet tbody tr'))"
                f".filter(r => !r.hidden).map(r => r.dataset['{field}'])")


def test_the_report_in_a_real_browser(runs):
    exe = _browser()
    _, a, _ = runs
    shots = a / "screenshots"
    with Browser(exe) as b:
        b.open((a / "index.html").as_uri())
        assert b.js("document.querySelectorAll('#fleet tbody tr').length") == 5
        assert _order(b, "name")[:2] == ["bad<b>&'name", "fermentation-tank-3-temp"]
        b.screenshot(shots / "index.png")
        b.click("th[data-sort=name] button")
        names = _order(b, "name")
        assert names == sorted(names, key=str.lower)
        b.click("th[data-sort=name] button")
        assert _order(b, "name") == sorted(names, key=str.lower, reverse=True)
        b.click("th[data-sort=headroom] button")
        rooms = [float(x) for x in _order(b, "headroom")]
        assert rooms == sorted(rooms)
        b.type_text("#filter", "steam")
        assert _order(b, "name") == ["steam-header-pressure"]
        assert b.js("document.getElementById('shown').textContent") == "1 of 5 loops shown"
        for page, figures in (("steam-header-pressure", 4), ("cold-store-air-temp", 5),
                              ("fermentation-tank-3-temp", 3), ("tricky-title", 4),
                              ("bad-b-name", 0)):
            b.open((a / "pages" / f"{page}.html").as_uri())
            sizes = b.js("Array.from(document.querySelectorAll('figure.fig')).map(f => {"
                         "const r = f.querySelector('svg.plot').getBoundingClientRect();"
                         "return [f.id, r.width, r.height]; })")
            assert len(sizes) == figures, (page, sizes)
            assert all(w > 100 and h > 100 for _, w, h in sizes), (page, sizes)
            b.screenshot(shots / f"{page}.png")
        b.open((a / "pages" / "tricky-title.html").as_uri())
        assert b.js("document.querySelector('.title').textContent") == NASTY
        assert b.js("typeof window.__lv_pwned") == "undefined"
        assert b.js("document.scripts.length") == 0
        assert b.errors() == []
    assert all((shots / f"{n}.png").stat().st_size > 10_000 for n in ("index", "tricky-title"))


def test_figures_are_deterministic_and_self_contained():
    from loopvet.report.figures import render

    def draw(fig):
        ax = fig.subplots()
        ax.plot([0, 1, 2], [0, 1, 0], label="a")
        ax.legend()
        return True

    one, two = (render(draw, "fig-x", "a <test>", 3, 2) for _ in range(2))
    assert one == two and one is not None
    assert one.startswith("<svg") and "<metadata" not in one and "Date" not in one
    assert 'aria-label="a &lt;test&gt;"' in one
    ids = re.findall(r'\sid="([^"]+)"', one)
    assert ids and all(i.startswith("fig-x-") for i in ids)
    refs = re.findall(r'(?:url\(#|href="#)([^)"]+)', one)
    assert set(refs) <= set(ids)


def _design(name: str, title: str = "", **extra) -> dict:
    base = {"name": name, "revision": 1, "path": f"designs/{name}.yaml", "status": "pass",
            "title": title, "metrics": {}, "requirements": [], "findings": []}
    return {**base, **extra}


def test_writers_survive_hostile_text_without_a_browser():
    from loopvet.report import junit, markdown, view

    entry = {"key": "phase_margin_deg", "status": "fail", "value": 30.0, "bound": {"min": 45},
             "headroom": -0.33, "scope": "nominal", "where": None}
    data = {"designs": [_design("a|b", "bell\x07 and <tag> | pipe", requirements=[entry]),
                        _design("a|b", status="invalid", revision=None,
                                errors=[{"path": "x", "line": 1, "column": 2,
                                         "message": "bad `code` <b>"}])],
            "summary": {"designs": 2, "pass": 0, "fail": 1, "invalid": 1, "degraded": 0,
                        "revision_not_bumped": 0, "removed": 0, "exit_code": 3}}
    root = ET.fromstring(junit.render(data).encode())          # control characters removed
    failure = root.find("testsuite/testcase/failure")
    assert failure is not None and "required ≥ 45 deg" in failure.get("message", "")
    text = markdown.render(data)
    assert "a\\|b" in text and "<b>" not in text and "\x07" not in text
    assert view.page_names(data["designs"]) == ["a-b.html", "a-b-2.html"]
    assert view.tightest(data["designs"][0]) == entry


@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=50))
def test_rounding_of_curves_in_one_pass_equals_value_by_value(values):
    """The array path of the 5-significant-digit rounding gives exactly the digits of the
    value-by-value path (Python's own '.5g' formatting), NaN -> None and infinities kept."""
    got = _r5s(np.array(values, dtype=float))
    want = [r5(v) for v in values]
    assert [repr(v) for v in got] == [repr(v) for v in want]
