"""A person's verdicts on pairs: importing them, and what they say about a threshold.

Verdicts live in the catalog (`Catalog.add_verdicts`). Calibration maps
similarity to the probability that a person says "same" with isotonic
regression (monotone, no shape assumed) and measures the precision of the
judged pairs above a threshold, with its Wilson interval, beside the synthetic
estimate.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.errors import UsageError
from ..core.rates import wilson_interval
from ..storage.catalog import VERDICTS
from ..storage.store import Store

MIN_EACH = 5  # verdicts of each kind needed before the isotonic fit means anything
MIN_ABOVE = 5  # judged pairs above a threshold needed to state a precision there


@dataclass(frozen=True)
class VerdictRow:
    """One line of a verdict file: two images (an image id or a path each, as written) and the verdict."""

    a: str
    b: str
    same: bool
    note: str | None
    line: int


def read_verdicts_csv(path: Path) -> list[VerdictRow]:
    """The one verdict file format, for `verdicts import` and `train --from-verdicts` alike: a CSV with the
    columns ``a``, ``b`` (image ids or paths), ``verdict`` (same / different, any case) and an optional
    ``note``. Every line is checked before any is used."""
    path = Path(path)
    rows = []
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            missing = {"a", "b", "verdict"} - set(reader.fieldnames or [])
            if missing:
                renamed = " (the columns path_a and path_b are now called a and b)" if {"path_a", "path_b"} <= set(
                    reader.fieldnames or []) else ""
                raise UsageError(f"{path}: the header must name the columns a, b and verdict "
                                 f"(missing {', '.join(sorted(missing))}){renamed}")
            for line, row in enumerate(reader, start=2):
                verdict = (row["verdict"] or "").strip().lower()
                if verdict not in VERDICTS:
                    raise UsageError(f"{path}, line {line}: the verdict must be same or different, "
                                     f"not {row['verdict']!r}")
                a, b = (row["a"] or "").strip(), (row["b"] or "").strip()
                if not a or not b:
                    raise UsageError(f"{path}, line {line}: both images (a and b) must be given")
                rows.append(VerdictRow(a, b, verdict == "same", (row.get("note") or "").strip() or None, line))
    except OSError as exc:
        raise UsageError(f"cannot read {path}: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise UsageError(f"{path} is not UTF-8 text") from None
    except csv.Error as exc:
        raise UsageError(f"{path} is not a readable CSV file: {exc}") from None
    return rows


def _file_id(store: Store, value: str, line: int) -> int:
    if value.isdigit():
        return int(value)
    file_id = store.catalog.file_id_for_path(Path(value).resolve())
    if file_id is None:
        raise UsageError(f"line {line}: {value!r} is neither an image id nor a catalogued path")
    return file_id


def import_csv(store: Store, path: Path, *, author: str | None = None) -> int:
    """Store the verdicts of a verdict file (`read_verdicts_csv`); all rows or none. Returns how many were
    stored."""
    pairs = [{"file_a": _file_id(store, r.a, r.line), "file_b": _file_id(store, r.b, r.line),
              "verdict": "same" if r.same else "different", "note": r.note} for r in read_verdicts_csv(path)]
    return len(store.catalog.add_verdicts(pairs, origin="csv", author=author))


def verdict_file_pairs(store: Store, path: Path) -> list[tuple[Path, Path, bool]]:
    """A verdict file's pairs as (path a, path b, same) for fine-tuning: an image id becomes its file's path
    in the catalog, a path is taken as written."""
    rows = read_verdicts_csv(path)
    ids = {int(v) for r in rows for v in (r.a, r.b) if v.isdigit()}
    known = store.catalog.paths_for(sorted(ids)) if ids else {}

    def where(value: str, line: int) -> Path:
        if not value.isdigit():
            return Path(value)
        if int(value) not in known:
            raise UsageError(f"{path}, line {line}: there is no image with id {value}")
        return Path(known[int(value)])

    return [(where(r.a, r.line), where(r.b, r.line), r.same) for r in rows]


def stored_verdict_pairs(catalog) -> list[tuple[Path, Path, bool]]:
    """The catalog's verdicts (the review page's clicks, `verdicts import`, the API) as (path a, path b, same)
    for fine-tuning: the latest verdict on each pair of contents, oldest first, once each.

    A verdict is kept by content, so it holds for every pair of files with those two contents; the first
    pair whose two files are both on disk stands for it (copies of one content are the same image), else the
    first pair, which fine-tuning then counts as unreadable. Raises UsageError when there is no verdict."""
    chosen: dict[int, tuple[str, str, str, bool]] = {}
    rows = catalog.latest_verdict_files()
    paths = catalog.paths_for(sorted({r[k] for r in rows for k in ("file_a", "file_b")})) if rows else {}
    for r in rows:
        a, b = paths.get(r["file_a"]), paths.get(r["file_b"])
        if a is None or b is None:
            continue
        held = chosen.get(r["id"])
        on_disk = Path(a).is_file() and Path(b).is_file()
        if held is None or (on_disk and not held[3]):
            chosen[r["id"]] = (r["verdict"], a, b, on_disk)
    if not chosen:
        raise UsageError("the store holds no verdicts yet: give some on the review page or with "
                         "`nearsight verdicts import FILE`")
    return [(Path(a), Path(b), verdict == "same") for _id, (verdict, a, b, _) in sorted(chosen.items())]


def verdict_report(sims: np.ndarray, same: np.ndarray, grid: np.ndarray, target: float, min_verdicts: int) -> dict | None:
    """Isotonic P(same | similarity), precision of judged pairs above each threshold and the
    lowest threshold whose judged precision reaches `target`; None when there are too few verdicts."""
    from sklearn.isotonic import IsotonicRegression

    from ..matching.generations import threshold_for_precision

    n, n_same = len(sims), int(np.sum(same))
    counts = {"verdicts": n, "same": n_same, "different": n - n_same}
    if n < min_verdicts or n_same < MIN_EACH or n - n_same < MIN_EACH:
        return {**counts, "used": False, "reason": f"needs {min_verdicts} verdicts with at least {MIN_EACH} of each kind",
                "precision_at": lambda t: None}
    iso = IsotonicRegression(increasing=True, y_min=0.0, y_max=1.0, out_of_bounds="clip").fit(sims, same)
    order = np.argsort(-sims)
    s_sorted, y_sorted = sims[order], same[order]

    def precision_at(t: float) -> dict:
        above = s_sorted >= t
        k, m = int(y_sorted[above].sum()), int(above.sum())
        lo, hi = wilson_interval(k, m)
        return {"threshold": float(t), "judged_pairs": m, "same": k,
                "precision": round(k / m, 4) if m else None, "interval": [round(float(lo), 4), round(float(hi), 4)]}

    curve = [precision_at(t) for t in grid]
    precisions = [c["precision"] if c["judged_pairs"] >= MIN_ABOVE else None for c in curve]
    try:
        threshold = threshold_for_precision(list(grid), precisions, target)
    except UsageError:
        threshold = None
    return {
        **counts, "used": True, "threshold": threshold,
        "isotonic": [[round(float(t), 4), round(float(p), 4)] for t, p in zip(grid, iso.predict(grid))],
        "precision_curve": [[c["threshold"], c["precision"]] for c in curve],
        "precision_at": precision_at,
    }
