"""HTML building blocks of the report: one static page, no scripts, no network.

Every block is a plain string of HTML; text from the store is escaped. A section that cannot
be drawn becomes a "not run" block (its stage has not run) or an "unavailable" block (an
output is missing or unreadable), so the rest of the page is always written.
"""

from __future__ import annotations

import html
import shutil
import subprocess
import tempfile
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import StageError

__all__ = ["Section", "esc", "figure_block", "table_block", "facts_block", "not_run_block",
           "problem_block", "render_page", "CAUTION", "chromium_args", "run_chromium",
           "find_chromium"]

CAUTION = ("These results are exploratory. Before any of them is reported or used to plan "
           "further work, check the experiment against the local animal-experiment protocols "
           "and licence, and have the statistics (cross-validation, null models, multiple-"
           "comparison control) reviewed by a statistician.")

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;max-width:62rem;
margin:0 auto;padding:1rem 1.5rem;color:#1a1a1a;line-height:1.45}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{border-bottom:1px solid #bbb;margin-top:2.2rem}
nav a{margin-right:.8rem}figure{margin:1rem 0}figure img{max-width:100%;height:auto;
border:1px solid #ddd}figcaption{font-size:.9rem;color:#333;margin-top:.3rem}
table{border-collapse:collapse;font-size:.9rem;margin:.6rem 0}
td,th{border:1px solid #ccc;padding:.2rem .5rem;text-align:left;vertical-align:top}
th{background:#f1f1f1}.caution{border-left:4px solid #D55E00;background:#fff4ec;
padding:.6rem 1rem}.notrun{border-left:4px solid #888;background:#f4f4f4;padding:.5rem 1rem;
color:#444}.problem{border-left:4px solid #E69F00;background:#fff9e8;padding:.5rem 1rem}
.warn li{color:#7a3b00}code{font-size:.85rem}
"""


@dataclass(frozen=True)
class Section:
    """One section of the page: an anchor id, a title and its HTML body."""

    key: str
    title: str
    body: str


def esc(text: Any) -> str:
    """HTML-escape any value's text."""
    return html.escape(str(text), quote=True)


def figure_block(src: str, caption: str, *, alt: str = "") -> str:
    """An image (relative path) with a caption saying what it shows and how it was made."""
    return (f'<figure><img src="{esc(src)}" alt="{esc(alt or caption[:120])}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def table_block(rows: Sequence[Mapping[str, Any]], *, columns: Sequence[str] | None = None,
                caption: str = "") -> str:
    """A table of rows (dicts); ``columns`` picks and orders the columns."""
    if not rows:
        return '<p class="notrun">(no rows)</p>'
    cols = list(columns or rows[0].keys())
    head = "".join(f"<th>{esc(c)}</th>" for c in cols)
    body = "".join("<tr>" + "".join(f"<td>{esc(_fmt(r.get(c, '')))}</td>" for c in cols)
                   + "</tr>" for r in rows)
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def facts_block(facts: Iterable[tuple[str, Any]]) -> str:
    """A two-column table of name / value."""
    rows = "".join(f"<tr><th>{esc(k)}</th><td>{esc(_fmt(v))}</td></tr>" for k, v in facts)
    return f"<table><tbody>{rows}</tbody></table>"


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    if isinstance(v, list | tuple):
        return ", ".join(_fmt(x) for x in v)
    return str(v)


def not_run_block(stage: str) -> str:
    """What the page shows for a section whose stage has not run."""
    return (f'<p class="notrun">Not run: stage <code>{esc(stage)}</code> has no record in '
            f"manifest.json. Run <code>forkmap run</code> and rebuild the report.</p>")


def problem_block(what: str, reason: str) -> str:
    """What the page shows when a section's output is missing or could not be drawn."""
    return (f'<p class="problem">{esc(what)} could not be shown: {esc(reason)}. The other '
            f"sections are unaffected.</p>")


def render_page(title: str, subtitle: str, sections: Sequence[Section]) -> str:
    """The whole page: header, caution, table of contents, sections in order."""
    nav = " ".join(f'<a href="#{esc(s.key)}">{esc(s.title)}</a>' for s in sections)
    body = "\n".join(f'<section id="{esc(s.key)}"><h2>{esc(s.title)}</h2>\n{s.body}</section>'
                     for s in sections)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{esc(title)}</title><style>{_CSS}</style></head><body>\n"
            f"<header><h1>{esc(title)}</h1><p>{esc(subtitle)}</p>"
            f'<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>'
            f"<nav>{nav}</nav></header>\n<main>\n{body}\n</main>\n</body></html>\n")


# ---- headless browser -----------------------------------------------------------------------
_CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                   "--no-first-run", "--disable-background-networking",
                   "--disable-component-update", "--disable-sync", "--hide-scrollbars",
                   "--enable-logging=stderr", "--v=0")


def find_chromium() -> str | None:
    """Path of a Chromium/Chrome executable, or None."""
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


def chromium_args(exe: str, profile_dir: Path, *extra: str) -> list[str]:
    """A headless, offline Chromium command line (no sandbox, no network services)."""
    return [exe, *_CHROMIUM_FLAGS, f"--user-data-dir={profile_dir}", *extra]


def run_chromium(page: Path, *extra: str, exe: str | None = None,
                 timeout_s: float = 60.0) -> subprocess.CompletedProcess[str]:
    """Open ``page`` in headless Chromium with ``extra`` flags (``--screenshot=...``).

    Raises
    ------
    StageError
        No Chromium is installed, or it did not finish within ``timeout_s``.
    """
    exe = exe or find_chromium()
    if exe is None:
        raise StageError("report.screenshot = true needs Chromium: install the 'chromium' "
                         "package (apt-get install chromium) or set report.screenshot = false")
    with tempfile.TemporaryDirectory(prefix="forkmap-chromium-") as profile:
        cmd = chromium_args(exe, Path(profile), *extra, page.resolve().as_uri())
        try:
            return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout_s,
                                  check=False)
        except subprocess.TimeoutExpired:
            raise StageError(f"chromium did not finish rendering {page} within {timeout_s} s"
                             ) from None
