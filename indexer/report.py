"""A self-contained HTML page of duplicate groups: one contact sheet per group.

Thumbnails are embedded as data URIs, the CSS is inline and there is no script,
so the file can be mailed, archived or opened offline. Every piece of text from
the collection (paths, formats, summary values) goes through html.escape.
"""

from __future__ import annotations

import base64
import html
import logging
from pathlib import Path
from typing import Callable

from .errors import NearsightError
from .fsutil import atomic_write_text
from .groups import Group, reclaimable_bytes, summarize

log = logging.getLogger(__name__)

# A browser struggles past a few thousand embedded images; later groups are
# counted in the summary but not drawn.
MAX_GROUPS = 2000

_CSS = """
:root { --line: #d0d4d9; --muted: #5b6168; --accent: #1f6f5c; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 1400px; padding: 1rem; color: #1d2125; background: #fafafa;
       font: 15px/1.4 system-ui, -apple-system, "Segoe UI", sans-serif; }
h1 { font-size: 1.4rem; margin: 0 0 .75rem; }
.summary { display: grid; grid-template-columns: repeat(auto-fit, minmax(10rem, 1fr)); gap: .5rem;
           margin: 0 0 1.5rem; padding: 0; }
.summary div { background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: .5rem .75rem; }
.summary dt { color: var(--muted); font-size: .8rem; }
.summary dd { margin: 0; font-size: 1.1rem; font-weight: 600; overflow-wrap: anywhere; }
.summary div.wide { grid-column: 1 / -1; }
.summary div.wide dd { font-size: .9rem; font-weight: 400; }
section { background: #fff; border: 1px solid var(--line); border-radius: 8px; padding: .75rem;
          margin: 0 0 1rem; }
section h2 { font-size: 1rem; margin: 0 0 .6rem; font-weight: 600; }
section h2 span { color: var(--muted); font-weight: 400; }
.sheet { display: grid; grid-template-columns: repeat(auto-fill, minmax(min(100%, 11rem), 1fr));
         gap: .6rem; }
figure { margin: 0; border: 1px solid var(--line); border-radius: 6px; overflow: hidden; }
figure.keeper { border: 2px solid var(--accent); }
figure img, figure .none { display: block; width: 100%; aspect-ratio: 1; object-fit: contain;
                           background: #eef0f2; }
figure .none { display: grid; place-items: center; color: var(--muted); font-size: .8rem; }
figcaption { padding: .4rem .5rem; font-size: .8rem; }
figcaption .path { overflow-wrap: anywhere; color: var(--muted); }
.badge { display: inline-block; padding: 0 .35rem; border-radius: 4px; border: 1px solid var(--line);
         font-size: .75rem; margin-right: .25rem; }
.keeper .badge.role { background: var(--accent); border-color: var(--accent); color: #fff; }
.more { color: var(--muted); }
"""

_MIME = ((b"\xff\xd8\xff", "image/jpeg"), (b"\x89PNG\r\n\x1a\n", "image/png"))


def human_bytes(n: int) -> str:
    """1536 -> '1.5 KiB' (binary units)."""
    value = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(value) < 1024 or unit == "TiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.1f} {unit}"
        value /= 1024
    return f"{n} B"


def _image(data: bytes | None, alt: str) -> str:
    for magic, mime in _MIME:
        if data and data.startswith(magic):
            encoded = base64.b64encode(data).decode("ascii")
            return f'<img src="data:{mime};base64,{encoded}" alt="{alt}" loading="lazy">'
    return '<div class="none">no preview</div>'


def _thumbnail(thumbnail: Callable[[int], bytes | None], ident: int) -> bytes | None:
    try:
        return thumbnail(ident)
    except (NearsightError, OSError) as error:  # a file gone since the scan: no preview, no abort
        log.warning("no thumbnail for image %d: %s", ident, error)
        return None


def _member(group: Group, member, thumbnail) -> str:
    m, esc = member.meta, html.escape
    keeper = member.id == group.keeper
    # A member's tier says how it relates to the keeper, so the keeper shows its role instead.
    badge = '<span class="badge role">keeper</span>' if keeper else f'<span class="badge">{esc(member.tier)}</span>'
    return (
        f'<figure class="{"keeper" if keeper else "member"}">'
        f"{_image(_thumbnail(thumbnail, member.id), esc(m.path))}"
        f"<figcaption>{badge}"
        f"<div>{m.width}&times;{m.height} &middot; {esc(human_bytes(m.file_size))} &middot; "
        f"{esc(m.format)}</div>"
        f"<div>similarity {member.similarity:.3f}</div>"
        f'<div class="path">{esc(m.path)}</div></figcaption></figure>'
    )


def _section(group: Group, thumbnail) -> str:
    esc = html.escape
    cards = "".join(_member(group, m, thumbnail) for m in group.members)
    return (
        f'<section id="group-{esc(group.gid)}"><h2>{esc(group.tier)} '
        f"<span>&middot; {group.size} files &middot; "
        f"{esc(human_bytes(reclaimable_bytes(group)))} could be freed &middot; "
        f"group {esc(group.gid)}</span></h2>"
        f'<div class="sheet">{cards}</div></section>'
    )


def _summary(groups: list[Group], extra: dict) -> str:
    totals = summarize(groups)
    items = {"groups": str(totals["groups"]), "files in groups": str(totals["files_in_groups"]),
             "could be freed": human_bytes(totals["reclaimable_bytes"])}
    items.update({str(k): str(v) for k, v in extra.items()})
    # A sentence (a calibrated question's answer) takes a row of its own, in body type.
    cells = "".join(f'<div{" class=wide" if len(v) > 60 else ""}><dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd></div>'
                    for k, v in items.items())
    return f'<dl class="summary">{cells}</dl>'


def write_html_report(groups: list[Group], out_path: Path, *,
                      thumbnail: Callable[[int], bytes | None], title: str, summary: dict,
                      max_groups: int = MAX_GROUPS) -> None:
    """Write the report atomically. `thumbnail(id)` returns JPEG (or PNG) bytes or None;
    `summary` adds caller facts (store, thresholds, model) under the computed totals."""
    shown = groups[:max_groups]
    more = len(groups) - len(shown)
    body = "".join(_section(g, thumbnail) for g in shown)
    if more:
        body += f'<p class="more">{more} more groups not shown (see the CSV or JSON export).</p>'
    page = (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head>"
        f"<body><h1>{html.escape(title)}</h1>{_summary(groups, summary)}{body}</body></html>\n"
    )
    atomic_write_text(Path(out_path), page)
    log.debug("wrote report of %d groups to %s", len(shown), out_path)
