"""HTML contact sheets: the duplicate groups of a generation, and the answer of `check`.

A report is a page and a folder beside it (``groups.html`` and ``groups_files/``) holding one small
JPEG a picture, so a page of 10,000 groups stays a few megabytes of HTML that a browser opens at once
and loads the images of as it scrolls. Copy or archive the two together. The CSS is inline and there is
no script; every piece of text from the collection (paths, formats, camera names) goes through
html.escape, and nothing is loaded from anywhere else.

What a sheet shows of each picture (indexer/acting/explain.py for groups): its thumbnail with the region it
shares with the keeper (or with the checked file) outlined, as geometric verification found it; its
key metadata side by side with the others' (pixels, file size and format, the camera's capture time
and make, an ICC profile, the modification time, the folder); the keeper and the reason it was chosen,
in plain words; and what a quarantine would do with each file.

The page and its folder are written whole or not at all: the images go to a hidden folder first, which
replaces the old one, and then the page is written atomically.
"""

from __future__ import annotations

import html
import io
import logging
import os
import shutil
from pathlib import Path
from typing import Callable, Iterable, Sequence

from PIL import Image

from ..core.errors import NearsightError
from ..core.fsutil import atomic_write_text, human_bytes
from ..matching.groups import Group, reclaimable_bytes, summarize

log = logging.getLogger(__name__)

# A page holds at most this many groups (or checked files); later ones are counted in the summary and
# listed by the CSV or JSON export. Measured in benchmarks/bench_report.py.
MAX_ITEMS = 20_000

_CSS = """
:root { --line: #d0d4d9; --muted: #5b6168; --accent: #1f6f5c; --warn: #8a4b08; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 1400px; padding: 1rem; color: #1d2125; background: #fafafa;
       font: 15px/1.4 system-ui, -apple-system, "Segoe UI", sans-serif; }
h1 { font-size: 1.4rem; margin: 0 0 .75rem; }
.summary { display: grid; grid-template-columns: repeat(auto-fit, minmax(min(100%, 12rem), 1fr)); gap: .5rem;
           margin: 0 0 1.5rem; padding: 0; }
.summary div { background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: .5rem .75rem;
               min-width: 0; }
.summary dt { color: var(--muted); font-size: .8rem; }
.summary dd { margin: 0; font-size: 1.1rem; font-weight: 600; overflow-wrap: break-word; }
.summary div.wide { grid-column: 1 / -1; }
.summary div.wide dd { font-size: .9rem; font-weight: 400; }
section { background: #fff; border: 1px solid var(--line); border-radius: 8px; padding: .75rem;
          margin: 0 0 1rem; }
section h2 { font-size: 1rem; margin: 0 0 .3rem; font-weight: 600; overflow-wrap: break-word; }
section h2 span, section p.why { color: var(--muted); font-weight: 400; }
section p.why { margin: 0 0 .6rem; font-size: .9rem; overflow-wrap: break-word; }
.sheet { display: grid; grid-template-columns: repeat(auto-fill, minmax(min(100%, 13rem), 1fr)); gap: .6rem; }
figure { margin: 0; border: 1px solid var(--line); border-radius: 6px; overflow: hidden; min-width: 0; }
figure.keeper, figure.query { border: 2px solid var(--accent); }
.frame { position: relative; display: block; }
.frame img, .frame .none { display: block; width: 100%; aspect-ratio: 1; object-fit: contain; background: #eef0f2; }
.frame .none { display: grid; place-items: center; color: var(--muted); font-size: .8rem; }
.region { position: absolute; border: 3px solid var(--accent); box-shadow: 0 0 0 1px #fff, inset 0 0 0 1px #fff; }
figcaption { padding: .4rem .5rem; font-size: .8rem; overflow-wrap: break-word; }
figcaption .name { font-weight: 600; }
figcaption .note { color: var(--muted); }
figcaption .act { margin: .2rem 0; }
dl.meta { display: grid; grid-template-columns: max-content minmax(0, 1fr); gap: 0 .5rem; margin: .3rem 0 0; }
dl.meta dt { color: var(--muted); }
dl.meta dd { margin: 0; min-width: 0; overflow-wrap: break-word; }
.badge { display: inline-block; padding: 0 .35rem; border-radius: 4px; border: 1px solid var(--line);
         font-size: .75rem; margin-right: .25rem; }
.keeper .badge.role, .query .badge.role { background: var(--accent); border-color: var(--accent); color: #fff; }
.badge.copy { color: #fff; background: var(--warn); border-color: var(--warn); }
ul.plain { padding-left: 1.2rem; overflow-wrap: break-word; }
.more { color: var(--muted); }
"""

_MIME_SUFFIX = ((b"\xff\xd8\xff", ".jpg"), (b"\x89PNG\r\n\x1a\n", ".png"))


class Pictures:
    """The report's image folder: each picture written once, under a name of its own."""

    def __init__(self, page: Path):
        self.final = page.parent / f"{page.stem}_files"
        self.partial = page.parent / f".{page.stem}_files.partial"
        shutil.rmtree(self.partial, ignore_errors=True)
        self.partial.mkdir(parents=True)
        self._written: dict[str, str | None] = {}
        self.sizes: dict[str, tuple[int, int]] = {}  # address -> the picture's (width, height)

    def add(self, key: str, read: Callable[[], bytes | None]) -> str | None:
        """The page's relative address of picture `key`, read with `read()` the first time; None if there is none."""
        if key not in self._written:
            data = _read(read, key)
            suffix = next((s for magic, s in _MIME_SUFFIX if data and data.startswith(magic)), None)
            name = None
            if suffix:
                name = f"{len(self._written)}{suffix}"
                (self.partial / name).write_bytes(data)
                try:
                    with Image.open(io.BytesIO(data)) as im:  # the header only: where a region goes
                        self.sizes[f"{self.final.name}/{name}"] = im.size
                except OSError:
                    pass
            self._written[key] = name
        name = self._written[key]
        return None if name is None else f"{self.final.name}/{name}"

    def publish(self) -> None:
        old = self.final.parent / f".{self.final.name}.old"
        shutil.rmtree(old, ignore_errors=True)
        if self.final.exists():
            os.replace(self.final, old)
        os.replace(self.partial, self.final)
        shutil.rmtree(old, ignore_errors=True)

    def discard(self) -> None:
        shutil.rmtree(self.partial, ignore_errors=True)


def _read(read: Callable[[], bytes | None], key: str) -> bytes | None:
    try:
        return read()
    except (NearsightError, OSError) as error:  # a file gone since the scan: no picture, no abort
        log.warning("no picture for %s: %s", key, error)
        return None


def breakable(text: str) -> str:
    """Escaped text that may wrap after each '/' of a path (an HTML <wbr>), so a path breaks between
    folder names, and within a name only when that name alone is wider than its box (CSS break-word)."""
    return html.escape(text).replace("/", "/<wbr>")


def in_square(box: Sequence[float], size: tuple[int, int]) -> tuple[float, float, float, float]:
    """A box in fractions of a picture as fractions of the square tile that shows the picture whole and
    centred (CSS object-fit: contain): the long side fills the tile, the short one is centred."""
    w, h = size
    sx, sy = (1.0, h / w) if w >= h else (w / h, 1.0)
    x0, y0, x1, y1 = (max(0.0, min(1.0, float(v))) for v in box)
    ox, oy = (1 - sx) / 2, (1 - sy) / 2
    return ox + x0 * sx, oy + y0 * sy, ox + x1 * sx, oy + y1 * sy


def _frame(src: str | None, alt: str, box: Sequence[float] | None, size: tuple[int, int] | None) -> str:
    esc = html.escape
    image = f'<img src="{esc(src)}" alt="{esc(alt)}" loading="lazy">' if src else '<div class="none">no preview</div>'
    region = ""
    if src and box and size:
        x0, y0, x1, y1 = in_square(box, size)
        region = (f'<span class="region" style="left:{x0 * 100:.2f}%;top:{y0 * 100:.2f}%;'
                  f'width:{(x1 - x0) * 100:.2f}%;height:{(y1 - y0) * 100:.2f}%"></span>')
    return f'<span class="frame">{image}{region}</span>'


def _meta_list(rows: Iterable[tuple[str, str]]) -> str:
    esc = html.escape
    return '<dl class="meta">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in rows) + "</dl>"


def meta_rows(m) -> list[tuple[str, str]]:
    """The metadata a keeper is chosen by, in the same order for every picture (a MemberFacts or ImageMeta)."""
    rows = [("Pixels", f"{m.width} × {m.height}"), ("File", f"{human_bytes(m.file_size)} · {m.format or '?'}")]
    if hasattr(m, "modified"):
        rows += [("Captured", (m.captured or "no capture time").replace("T", " ")),
                 ("Camera", m.camera or "not named"), ("Colour profile", "ICC profile" if m.icc else "none"),
                 ("Modified", m.modified.replace("T", " ").replace("Z", " UTC")),
                 ("Folder", m.folder if m.folder != "." else "the top of its source")]
    return rows


def _figure(css: str, src: str | None, name: str, badge: str, lines: Sequence[str], rows, box, path: str,
            size: tuple[int, int] | None = None) -> str:
    esc = html.escape
    notes = "".join(f"<div>{line}</div>" for line in lines)  # lines are built escaped
    return (f'<figure class="{css}">{_frame(src, path, box, size)}<figcaption>{badge}'
            f'<div class="name">{esc(name)}</div>{notes}{_meta_list(rows)}'
            f'<div class="note">{breakable(path)}</div></figcaption></figure>')


# ---------------------------------------------------------------- groups

_ACTIONS = {"move": "would move", "stay": "stays", "changed": "left alone", "keep": "kept"}


def _group_section(group: Group, facts, pictures: Pictures, thumbnail) -> str:
    esc = html.escape
    cards = []
    if facts is not None:
        keeper = facts.keeper
        why = f'<p class="why">Keep {esc(os.path.basename(facts.members[0].path))}: it {esc(facts.keeper_reason)}.</p>'
        for m in facts.members:
            src = pictures.add(f"file-{m.id}", lambda i=m.id: thumbnail(i))
            is_keeper = m.id == keeper
            badge = ('<span class="badge role">keeper</span>' if is_keeper
                     else f'<span class="badge">{esc(m.tier)}</span>')
            act = f'<span class="act">{esc(_ACTIONS.get(m.action, m.action))}: {esc(m.why)}</span>'
            lines = [] if is_keeper else [f"similarity {m.similarity:.3f}", act]
            if m.match is not None and not is_keeper:
                lines.append(f'<span class="note">{esc(m.match["reason"])}</span>')
            box = None if is_keeper or m.match is None else m.match["member_box"]
            cards.append(_figure("keeper" if is_keeper else "member", src, os.path.basename(m.path), badge, lines,
                                 meta_rows(m), box, m.path, pictures.sizes.get(src)))
    else:  # no store to explain it with: the generation's own keeper and facts
        why = ""
        for member in group.members:
            m = member.meta
            src = pictures.add(f"file-{member.id}", lambda i=member.id: thumbnail(i))
            is_keeper = member.id == group.keeper
            badge = ('<span class="badge role">keeper</span>' if is_keeper
                     else f'<span class="badge">{esc(member.tier)}</span>')
            cards.append(_figure("keeper" if is_keeper else "member", src, os.path.basename(m.path), badge,
                                 [f"similarity {member.similarity:.3f}"], meta_rows(m), None, m.path))
    return (f'<section id="group-{esc(group.gid)}"><h2>{esc(group.tier)} '
            f"<span>&middot; {group.size} files &middot; "
            f"{esc(human_bytes(reclaimable_bytes(group)))} could be freed &middot; "
            f"group {esc(group.gid)}</span></h2>{why}"
            f'<div class="sheet">{"".join(cards)}</div></section>')


def _summary(items: dict) -> str:
    # A sentence (a calibrated question's answer) takes a row of its own, in body type.
    cells = "".join(f'<div{" class=wide" if len(str(v)) > 60 else ""}><dt>{html.escape(str(k))}</dt>'
                    f"<dd>{breakable(str(v))}</dd></div>" for k, v in items.items())
    return f'<dl class="summary">{cells}</dl>'


def _page(title: str, summary: dict, body: str) -> str:
    return ('<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{html.escape(title)}</title><style>{_CSS}</style></head>"
            f"<body><h1>{html.escape(title)}</h1>{_summary(summary)}{body}</body></html>\n")


def _write(out_path: Path, title: str, summary: dict, sections: Callable[[Pictures], Iterable[str]]) -> None:
    out_path = Path(out_path)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    pictures = Pictures(out_path)
    try:
        body = "".join(sections(pictures))
        pictures.publish()
    except BaseException:
        pictures.discard()
        raise
    atomic_write_text(out_path, _page(title, summary, body))


def write_html_report(groups: list[Group], out_path: Path, *, thumbnail: Callable[[int], bytes | None],
                      title: str, summary: dict, explain: Callable[[Group], object] | None = None,
                      max_groups: int = MAX_ITEMS) -> None:
    """Write the groups' contact sheets: the page `out_path` and its picture folder beside it.

    `thumbnail(id)` returns JPEG (or PNG) bytes or None; `summary` adds caller facts (store, thresholds,
    model) under the computed totals; `explain(group)` gives indexer/acting/explain.py's GroupFacts (the keeper
    now and why, the metadata, the plan's action, the common region), or None to show the group as built."""
    shown = groups[:max_groups]
    totals = summarize(groups)
    items = {"groups": totals["groups"], "files in groups": totals["files_in_groups"],
             "could be freed": human_bytes(totals["reclaimable_bytes"]), **summary}

    def sections(pictures: Pictures) -> Iterable[str]:
        for group in shown:
            yield _group_section(group, explain(group) if explain else None, pictures, thumbnail)
        if len(groups) > len(shown):
            yield f'<p class="more">{len(groups) - len(shown)} more groups not shown (see the CSV or JSON export).</p>'

    _write(out_path, title, items, sections)
    log.debug("wrote report of %d groups to %s", len(shown), out_path)


# ---------------------------------------------------------------- check

_VERDICT_WORDS = {"copy": "a copy of a file in the archive", "similar": "similar to a file in the archive",
                  "new": "new: nothing in the archive comes close", "unreadable": "unreadable"}


def _check_section(answer, pictures: Pictures, read_given, thumbnail) -> str:
    esc = html.escape
    match = answer.match or {}
    evidence = match.get("evidence") or {}
    given = pictures.add(f"given-{answer.path}", lambda: read_given(answer.path))
    score = f"similarity {match['similarity']:.3f}"
    if match.get("probability") is not None:
        score += f" · chance of a copy {match['probability']:.0%}"
    if evidence.get("same_bytes"):
        said, boxes = "the same bytes as the archive's file", ([0, 0, 1, 1], [0, 0, 1, 1])
    elif evidence.get("verified"):
        said = f"matches in the outlined region ({evidence['inliers']} keypoints agree)"
        boxes = (evidence.get("query_box"), evidence.get("box"))
    elif evidence:
        said, boxes = f"no common region was verified: {evidence.get('reason', '')}", (None, None)
    else:
        said, boxes = "geometric verification did not run on this match", (None, None)
    query = _figure("query", given, os.path.basename(answer.path), '<span class="badge role">checked</span>',
                    [esc(score), f'<span class="note">{esc(said)}</span>'], [], boxes[0], answer.path,
                    pictures.sizes.get(given))
    found = pictures.add(f"file-{match['id']}", lambda: thumbnail(match["id"]))
    archive = _figure("member", found, os.path.basename(match.get("path") or ""),
                      '<span class="badge">in the archive</span>', [f"#{match['id']}"], [], boxes[1],
                      match.get("path") or "", pictures.sizes.get(found))
    badge = '<span class="badge copy">copy</span>' if answer.verdict == "copy" else '<span class="badge">similar</span>'
    return (f'<section><h2>{badge}{esc(os.path.basename(answer.path))} <span>&middot; '
            f"{esc(_VERDICT_WORDS[answer.verdict])}</span></h2>"
            f'<div class="sheet">{query}{archive}</div></section>')


def write_check_report(answers: list, out_path: Path, *, read_given: Callable[[str], bytes | None],
                       thumbnail: Callable[[int], bytes | None], title: str, summary: dict,
                       max_items: int = MAX_ITEMS) -> None:
    """Write `check`'s contact sheet: each copy and similar file beside its match in the archive, with the
    common region outlined on both; then the new files, then the unreadable ones with their reasons.
    `answers`: check.CheckAnswer; `read_given(path)` a thumbnail of a checked file; `thumbnail(id)` one of a
    catalogued file."""
    counts = {v: sum(a.verdict == v for a in answers) for v in _VERDICT_WORDS}

    def sections(pictures: Pictures) -> Iterable[str]:
        esc = html.escape
        found = [a for a in answers if a.verdict in ("copy", "similar")][:max_items]
        for answer in found:
            yield _check_section(answer, pictures, read_given, thumbnail)
        new = [a for a in answers if a.verdict == "new"][:max_items]
        if new:
            cards = "".join(
                _figure("member", pictures.add(f"given-{a.path}", lambda p=a.path: read_given(p)),
                        os.path.basename(a.path), '<span class="badge">new</span>', [], [], None, a.path)
                for a in new)
            yield (f'<section id="new"><h2>New <span>&middot; {len(new)} files</span></h2>'
                   f'<div class="sheet">{cards}</div></section>')
        bad = [a for a in answers if a.verdict == "unreadable"]
        if bad:
            items = "".join(f"<li>{esc(a.path)}: {esc((a.error or {}).get('message', ''))}</li>" for a in bad)
            yield (f'<section id="unreadable"><h2>Unreadable <span>&middot; {len(bad)} files</span></h2>'
                   f'<ul class="plain">{items}</ul></section>')

    _write(out_path, title, {**{f"{v}": n for v, n in counts.items()}, **summary}, sections)
    log.debug("wrote check report of %d files to %s", len(answers), out_path)
