"""The HTML review report: ``index.html`` and one page per design under ``pages/``.

Rendered with jinja2 (autoescape on, strict undefined) from results.json data only; every
piece of record text goes through the template's escaping, figures are inline SVG drawn
from the same data (:mod:`.figures`), and style and script are inlined, so the report opens
offline and loads nothing from anywhere (its Content-Security-Policy allows no fetch at
all). The only line that differs between two runs on the same inputs is the ``stamp`` line
with the generation time and the tool version.
"""

from __future__ import annotations

import base64
import hashlib
from collections.abc import Sequence
from importlib import resources
from typing import Any

from jinja2 import Environment, PackageLoader

from . import view
from .figures import design_figures
from .view import CAUTION

_ENV: Environment | None = None


def environment() -> Environment:
    global _ENV
    if _ENV is None:
        env = Environment(loader=PackageLoader("loopvet.report", "templates"),
                          autoescape=True, trim_blocks=True,
                          lstrip_blocks=True, keep_trailing_newline=True)
        env.globals.update(
            num=view.num, signed=view.signed, headroom_text=view.headroom_text,
            label=view.label, bound_text=view.bound_text, where_text=view.where_text,
            value_text=view.value_text, revision_text=view.revision_text,
            approved_of=view.approved_of, tightest=view.tightest, drifted=view.drifted,
            as_float=view.as_float, scopes=view.SCOPES, caution=CAUTION)
        _ENV = env
    return _ENV


def _asset(name: str) -> str:
    return resources.files("loopvet.report").joinpath("templates", name).read_text("utf-8")


def _policy(script: str) -> str:
    digest = base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode()
    scripts = f"'sha256-{digest}'" if script else "'none'"
    return (f"default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
            f"script-src {scripts}; base-uri 'none'; form-action 'none'")


def _headroom_key(d: view.Design) -> str:
    t = view.tightest(d)
    h = view.as_float(t["headroom"]) if t else None
    if h is None:
        return "-Infinity" if t is not None else "Infinity"
    return repr(h) if h == h and abs(h) != float("inf") else ("Infinity" if h > 0
                                                               else "-Infinity")


def _row(rank: int, d: view.Design, page: str) -> dict[str, Any]:
    b = d.get("baseline") or {}
    status = b.get("status")
    stale = bool(b.get("content_changed") and not b.get("revision_bumped")
                 and status not in ("new", "removed"))
    drifted = view.drifted(d)
    worse = sum(c["verdict"] == "degraded" for c in drifted)
    failing = d["status"] in ("fail", "invalid")
    return {"rank": rank, "d": d, "page": page, "tight": view.tightest(d),
            "headroom_key": _headroom_key(d), "drift": status, "stale": stale,
            "drifted": len(drifted), "worse": worse, "fail": failing,
            "moved": status in ("degraded", "changed", "improved", "removed") or stale,
            "attention": failing or stale or status in ("degraded", "removed"),
            "text": " ".join(str(d.get(k) or "") for k in ("name", "title", "path")).lower()}


def index(data: dict[str, Any], stamp: str, pages: Sequence[str]) -> str:
    designs = data["designs"]
    order = sorted(range(len(designs)), key=lambda i: view.attention(designs[i]))
    rows = [_row(n + 1, designs[i], pages[i]) for n, i in enumerate(order)]
    script = _asset("report.js")
    return environment().get_template("index.html").render(
        rows=rows, summary=data["summary"], baseline=data.get("baseline"), stamp=stamp,
        css=_asset("report.css"), script=script, policy=_policy(script))


def design_page(d: view.Design, stamp: str, fleet_baseline: dict[str, Any] | None) -> str:
    return environment().get_template("design.html").render(
        d=d, figures=design_figures(d), stamp=stamp, fleet_baseline=fleet_baseline,
        css=_asset("report.css"), policy=_policy(""))


def _page_job(item: tuple[view.Design, str, dict[str, Any] | None]) -> str:
    return design_page(*item)


def render_all(data: dict[str, Any], stamp: str, jobs: int = 1) -> dict[str, str]:
    """Every file of the report: relative path -> text."""
    designs = data["designs"]
    names = view.page_names(designs)
    work = [(d, stamp, data.get("baseline")) for d in designs]
    if jobs > 1 and len(work) > 1:
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=min(jobs, len(work))) as pool:
            texts = list(pool.map(_page_job, work, chunksize=1))
    else:
        texts = [_page_job(w) for w in work]
    out = {"index.html": index(data, stamp, [f"pages/{n}" for n in names])}
    out.update({f"pages/{n}": t for n, t in zip(names, texts, strict=True)})
    return out
