"""Write the report files of a check run into its output folder (the disk edge).

``junit.xml`` and ``summary.md`` always; ``index.html`` and ``pages/*.html`` unless the
HTML report is turned off, in which case an earlier HTML report in the folder is removed,
so that it cannot be taken for this run's. Every file is written atomically.
"""

from __future__ import annotations

import os
import time
from typing import Any

from .. import __version__
from . import junit, markdown
from .files import write_atomic


def stamp() -> str:
    """The one line that differs between runs: generation time (UTC; SOURCE_DATE_EPOCH
    fixes it) and tool version."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH", "").strip()
    at = int(epoch) if epoch.isdigit() else int(time.time())
    return (f"generated {time.strftime('%Y-%m-%d %H:%M:%S UTC', time.gmtime(at))} "
            f"by loopvet {__version__}")


def _stale(out: str, keep: set[str]) -> list[str]:
    pages = os.path.join(out, "pages")
    found = [os.path.join("pages", f) for f in sorted(os.listdir(pages))
             if f.endswith(".html")] if os.path.isdir(pages) else []
    if os.path.isfile(os.path.join(out, "index.html")):
        found.append("index.html")
    return [f for f in found if f not in keep]


def write_reports(out: str, data: dict[str, Any], *, html: bool = True, jobs: int = 1
                  ) -> list[str]:
    """Render and write every report file; returns the relative paths written."""
    files = {"junit.xml": junit.render(data), "summary.md": markdown.render(data)}
    if html:
        from .html import render_all

        files.update(render_all(data, stamp(), jobs))
    for rel, text in files.items():
        write_atomic(os.path.join(out, rel), text)
    for rel in _stale(out, set(files)):
        os.unlink(os.path.join(out, rel))
    return list(files)
