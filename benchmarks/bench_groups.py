"""Groups on real photographs: a collection that holds copies, grouped as `nearsight index` groups it.

The quality benchmark (bench_quality.py) asks queries against a collection without duplicates; a
user's `groups` and `quarantine` work on a collection that holds them. This benchmark plants copies
into the quality benchmark's collection and measures what the published groups find:

* the collection: bench_quality's indexed photo tiles and invented distractors (hard links), plus
  `--per-transform` copies of indexed tiles for every transform of benchmarks/protocol.py (the query
  files bench_quality wrote, each a copy of the tile it was made from);
* the store: a new one, with the trained model of a bench_quality store installed as its current model,
  indexed with `retrain="never"`: the scan, embedding, calibration and grouping of `nearsight index`;
* the truth: two files are duplicates when they show the same tile (a tile and its copies, two copies of
  one tile); neighbouring tiles of one photograph are different pictures, as in bench_quality.

Reported: pair precision and recall of the published groups (duplicate tiers), overall and by the
copies' family and severity; the same for the descriptor alone at the groups' threshold and for the
best single descriptor threshold at precision 0.99 (an oracle that uses the truth); pHash at Hamming
distance <= 10 (imagehash, a cut-off common in practice, from memory); what calibration estimated
against what was realised; the wrong pairs; and what the no-chaining rule costs: over the generation's
confirmed pairs (pairs.npz at the near-duplicate threshold: descriptor, verified and asked pairs), the pairs
themselves, star groups (every member confirmed with one centre) and connected components (any chain), each
split into tile-copy and copy-copy pairs.

    .venv/bin/python benchmarks/bench_groups.py --work WORK      # WORK: a bench_quality --work folder

Nothing is asserted: the report states the figures.
"""

from __future__ import annotations

import argparse
import itertools
import json
import logging
import os
import re
import shutil
import sys
import time
from collections import Counter, defaultdict
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import baselines  # noqa: E402
from benchmarks.common import machine, write_report  # noqa: E402

log = logging.getLogger("bench_groups")

LIBRARIES = ("numpy", "torch", "faiss-cpu", "pillow", "imagehash")
PHASH_COMMON_CUT = 10  # Hamming distance <= 10 of 64 bits (common practice, from memory), as bench_quality
TILE_SUFFIX = re.compile(r"-r\d+c\d+(?=\.png$)")
DUPLICATE_TIERS = ("same-bytes", "same-pixels", "near-duplicate")


def photo_of(name: str) -> str | None:
    """The photograph a collection tile was cut from (None for a distractor)."""
    return TILE_SUFFIX.sub("", name) if name.startswith("photo-") else None


def plant(work: Path, per_transform: int, seed: int) -> tuple[Path, dict[str, dict]]:
    """The grouped folder under work/groups: the collection (hard links) and the planted copies.
    Returns (folder, {relative path: {"key": what it shows, "family", "transform", "severity"}})."""
    saved = json.loads((work / "queries.json").read_text())
    names, records = saved["names"], saved["records"]
    folder = work / "groups" / "archive"
    if folder.exists():
        shutil.rmtree(folder)
    (folder / "collection").mkdir(parents=True)
    files: dict[str, dict] = {}
    for name in names:
        target = folder / "collection" / name
        try:
            os.link(work / "collection" / name, target)
        except OSError:
            shutil.copy2(work / "collection" / name, target)
        files[f"collection/{name}"] = {"key": name, "family": None, "transform": None, "severity": None}
    by_transform = defaultdict(list)
    for r in records:
        if r["gt"] >= 0:  # its tile is indexed: the copy has an original in the collection
            by_transform[r["transform"]].append(r)
    rng = np.random.default_rng(seed)
    for transform in sorted(by_transform):
        pool = by_transform[transform]
        for i in sorted(rng.permutation(len(pool))[:per_transform].tolist()):
            r = pool[i]
            src = Path(r["path"])
            rel = f"copies/{transform}/{Path(r['ref']).stem}{src.suffix}"
            (folder / rel).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, folder / rel)
            files[rel] = {"key": r["ref"], "family": r["family"], "transform": transform, "severity": r["severity"]}
    return folder, files


def install_model(trained: Path, store_dir: Path) -> str:
    """A new store whose current model is the trained store's (copied), so indexing does not train."""
    from benchmarks.bench_quality import _store

    version = (trained / "models" / "CURRENT").read_text().strip()
    with _store(store_dir) as store:
        store.models_dir.mkdir(parents=True, exist_ok=True)
        shutil.copytree(trained / "models" / version, store.models_dir / version)
        store.write_pointer("models/CURRENT", version)
    return version


def truth_pairs(files: dict[str, dict]) -> set[frozenset]:
    by_key = defaultdict(list)
    for rel, info in files.items():
        by_key[info["key"]].append(rel)
    return {frozenset(p) for members in by_key.values() for p in itertools.combinations(sorted(members), 2)}


def pair_figures(called: set[frozenset], truth: set[frozenset], files: dict[str, dict]) -> dict:
    """Precision and recall of `called` against `truth`; recall by the copy's family and severity
    (a pair of two copies counts under each copy's label)."""
    right = called & truth
    out = {"called": len(called), "correct": len(right), "truth": len(truth),
           "precision": len(right) / max(1, len(called)), "recall": len(right) / max(1, len(truth))}
    for label in ("family", "severity"):
        found, total = Counter(), Counter()
        for pair in truth:
            for rel in pair:
                value = files[rel][label]
                if value is not None:
                    total[value] += 1
                    found[value] += pair in right
        out[f"recall_by_{label}"] = {k: {"n": total[k], "recall": found[k] / total[k]} for k in sorted(total)}
    return out


def wrong_kind(pair: frozenset, files: dict[str, dict]) -> str:
    a, b = (files[r]["key"] for r in pair)
    pa, pb = photo_of(a), photo_of(b)
    if pa is not None and pa == pb:
        return "tiles of one photograph"
    if pa is None and pb is None:
        return "two distractors"
    return "other"


def oracle_threshold(scores: np.ndarray, y: np.ndarray, target: float) -> tuple[float, float]:
    """(threshold, recall): the lowest threshold from which realised precision stays >= target (uses the truth)."""
    order = np.argsort(-scores, kind="stable")
    tp = np.cumsum(y[order])
    precision = tp / np.arange(1, len(order) + 1)
    ok = np.minimum.accumulate(precision) >= target
    k = int(ok.sum())
    if k == 0:
        return float("nan"), 0.0
    return float(scores[order][k - 1]), float(tp[k - 1] / max(1, y.sum()))


def star_groups(a: np.ndarray, b: np.ndarray) -> list[set[int]]:
    """Greedy star groups over the pairs (a, b): the free node with the most free partners becomes a centre and
    takes all of them, so every member is paired with its centre (members may be two pairs apart)."""
    partners: dict[int, set[int]] = defaultdict(set)
    for x, y in zip(a.tolist(), b.tolist()):
        partners[x].add(y)
        partners[y].add(x)
    free, out = set(partners), []
    while free:
        centre = max(free, key=lambda n: (len(partners[n] & free), -n))
        group = {centre} | (partners[centre] & free)
        if len(group) < 2:
            break
        out.append(group)
        free -= group
    return out


def component_groups(a: np.ndarray, b: np.ndarray) -> list[set[int]]:
    """Connected components of the pairs (a, b): what grouping would give if it chained (scipy.sparse.csgraph)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    nodes = np.unique(np.r_[a, b])
    if len(nodes) == 0:
        return []
    ia, ib = np.searchsorted(nodes, a), np.searchsorted(nodes, b)
    _, labels = connected_components(coo_matrix((np.ones(len(ia)), (ia, ib)), shape=(len(nodes),) * 2), directed=False)
    return [set(nodes[labels == k].tolist()) for k in np.unique(labels)]


def chaining_figures(a: np.ndarray, b: np.ndarray, name: dict[int, str], groups_called: set[frozenset],
                     truth: set[frozenset], files: dict[str, dict]) -> dict:
    """Pair precision and recall (all, tile-copy, copy-copy) of the published groups, of the confirmed pairs
    (a, b) themselves, and of star groups and connected components over them."""
    tile_copy = {p for p in truth if any(files[x]["family"] is None for x in p)}
    copy_copy = truth - tile_copy

    def pairs(groups):
        return {frozenset((name[x], name[y])) for g in groups for x, y in itertools.combinations(sorted(g), 2)}

    def figures(called):
        right = called & truth
        return {"called": len(called), "wrong": len(called - truth),
                "precision": len(right) / len(called) if called else None, "recall": len(right) / max(1, len(truth)),
                "recall_tile_copy": len(called & tile_copy) / max(1, len(tile_copy)),
                "recall_copy_copy": len(called & copy_copy) / max(1, len(copy_copy))}

    return {"tile_copy_pairs": len(tile_copy), "copy_copy_pairs": len(copy_copy),
            "groups": figures(groups_called), "confirmed": figures({frozenset((name[x], name[y])) for x, y in zip(a, b)}),
            "star": figures(pairs(star_groups(a, b))), "components": figures(pairs(component_groups(a, b)))}


def run(args) -> dict:
    from benchmarks.bench_quality import _store
    from nearsight.indexer.building.build import whitened_vectors
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.matching.generations import require_current

    started = time.monotonic()
    folder, files = plant(args.work, args.per_transform, args.seed)
    truth = truth_pairs(files)
    store_dir = args.work / "groups" / "store"
    if store_dir.exists():
        shutil.rmtree(store_dir)
    version = install_model(args.work / "stores" / args.store, store_dir)
    log.info("indexing %d files (%d planted copies) with model %s", len(files),
             sum(1 for f in files.values() if f["family"]), version)
    t0 = time.monotonic()
    with _store(store_dir, create=False) as store:
        summary = run_index(store, [folder], progress=False, retrain="never")
        index_s = time.monotonic() - t0
        gen = require_current(store)
        groups = gen.load_groups()["groups"]
        cal = gen.load_calibration() or {}
        thresholds = gen.meta["thresholds"]
        ids, xb = whitened_vectors(store, gen.meta["model"], gen.load_whitening())
        meta = store.catalog.image_meta(ids.tolist())
        with np.load(gen.path / "pairs.npz") as saved:
            keep = saved["sims"] >= float(thresholds["near"])
            confirmed = saved["a"][keep].astype(np.int64), saved["b"][keep].astype(np.int64)
        pair_meta = store.catalog.image_meta(np.unique(np.r_[confirmed[0], confirmed[1]]).tolist())

    def rel(path: str) -> str:
        return Path(path).resolve().relative_to(folder.resolve()).as_posix()

    called = set()
    for group in groups:
        members = sorted(rel(m["path"]) for m in group["members"] if m["tier"] in DUPLICATE_TIERS)
        called |= {frozenset(p) for p in itertools.combinations(members, 2)}
    result = {"machine": machine(LIBRARIES), "args": {k: str(v) for k, v in vars(args).items()},
              "set": list(getattr(args, "set", [])),
              "files": len(files), "copies": sum(1 for f in files.values() if f["family"]),
              "model": version, "index_s": round(index_s, 1), "stages": summary.get("stages"),
              "thresholds": thresholds, "groups": pair_figures(called, truth, files)}
    wrong = sorted(called - truth, key=lambda p: sorted(p))
    result["groups"]["wrong"] = [{"pair": sorted(p), "kind": wrong_kind(p, files)} for p in wrong]

    result["chaining"] = chaining_figures(*confirmed, {int(i): rel(m["path"]) for i, m in pair_meta.items()},
                                          called, truth, files)

    # The descriptor alone over every pair of indexed files: at the groups' threshold, and the oracle's best.
    rels = [rel(meta[int(i)]["path"]) for i in ids]
    a, b = np.triu_indices(len(rels), 1)
    sims = (xb @ xb.T)[a, b]
    y = np.array([frozenset((rels[i], rels[j])) in truth for i, j in zip(a, b)], dtype=bool)
    t = float(thresholds["near"])
    desc_called = {frozenset((rels[i], rels[j])) for i, j in zip(a[sims >= t], b[sims >= t])}
    result["descriptor"] = pair_figures(desc_called, truth, files) | {"threshold": t}
    result["descriptor"].pop("recall_by_severity")
    o_t, o_r = oracle_threshold(sims, y, 0.99)
    result["oracle"] = {"threshold": o_t, "recall": o_r, "indexed_truth_pairs": int(y.sum())}

    # pHash over the same files at its common cut-off.
    paths = [folder / r for r in files]
    bits = baselines.describe_files(paths)["phash"]
    names = list(files)
    sim = baselines.phash_similarity(bits, bits)
    cut = 1 - PHASH_COMMON_CUT / baselines.PHASH_BITS
    ia, ib = np.triu_indices(len(names), 1)
    hit = sim[ia, ib] >= cut
    ph_called = {frozenset((names[i], names[j])) for i, j in zip(ia[hit], ib[hit])}
    result["phash"] = pair_figures(ph_called, truth, files)
    result["phash"].pop("recall_by_severity")

    near = (cal.get("tiers") or {}).get("near") or {}
    result["calibration"] = {
        "headline": (cal.get("summary") or {}).get("headline"), "groups": cal.get("groups"),
        "floor": (cal.get("negatives") or {}).get("floor"), "threshold_pairs": near.get("threshold_pairs"),
        "target_met": near.get("target_met"), "estimated": near.get("at_threshold"),
        "estimated_duplicate_pairs": near.get("duplicate_pairs"),
        "query_descriptor_threshold": (cal.get("query") or {}).get("descriptor_threshold")}
    result["wall_s"] = round(time.monotonic() - started, 1)
    return result


def _pct(x) -> str:
    return "-" if x is None else f"{x:.3f}"


def render(r: dict) -> list[str]:
    g, d, p, o, c = r["groups"], r["descriptor"], r["phash"], r["oracle"], r["calibration"]
    est = c.get("estimated") or {}
    lines = [
        "# Groups on a collection of real photographs that holds copies", "",
        f"Machine: {r['machine']}", "",
        f"Command: `.venv/bin/python benchmarks/bench_groups.py --work {r['args']['work']} --per-transform "
        f"{r['args']['per_transform']}{''.join(' --set ' + x for x in r.get('set', []))}` (the work folder of a bench_quality run; model {r['model']}, "
        f"its store `{r['args']['store']}`).", "",
        f"{r['files']} files: bench_quality's collection and {r['copies']} planted copies of indexed tiles "
        f"({r['args']['per_transform']} per transform). {g['truth']} duplicate pairs by the truth (a tile and its "
        f"copies, two copies of one tile). `nearsight index` with `retrain=never`: {r['index_s']} s "
        f"(stages: {', '.join(f'{k} {v:.1f}' for k, v in (r['stages'] or {}).items())}).", "",
        "| pairs called by | threshold | called | correct | precision | recall |",
        "|---|---:|---:|---:|---:|---:|",
        f"| the published groups (descriptor, verified pairs, no chaining) | {r['thresholds']['near']:.3f} "
        f"({r['thresholds'].get('source', '')}) | {g['called']} | {g['correct']} | {g['precision']:.3f} | {g['recall']:.3f} |",
        f"| the descriptor alone at the groups' threshold | {d['threshold']:.3f} | {d['called']} | {d['correct']} | "
        f"{d['precision']:.3f} | {d['recall']:.3f} |",
        f"| the descriptor alone, best threshold at realised precision 0.99 (oracle) | {o['threshold']:.3f} | | | 0.99 | "
        f"{o['recall']:.3f} |",
        f"| pHash, Hamming <= {PHASH_COMMON_CUT} | | {p['called']} | {p['correct']} | {p['precision']:.3f} | "
        f"{p['recall']:.3f} |", "",
        f"Calibration: {c.get('headline')}", "",
        f"- pairwise threshold {_pct(c.get('threshold_pairs'))} (target met: {c.get('target_met')}), floor "
        f"{_pct(c.get('floor'))}, query verdict's descriptor threshold {_pct(c.get('query_descriptor_threshold'))}; "
        f"groups: {(c.get('groups') or {}).get('reason')}",
        f"- estimated at the groups' threshold: precision {_pct(est.get('precision'))}, recall "
        f"{_pct(est.get('recall'))}, {est.get('called_pairs')} pairs called; duplicate pairs estimated "
        f"{c.get('estimated_duplicate_pairs') or 0:.0f} against {g['truth']} planted", "",
        "Recall by the copies' family (each pair counted under each copy in it):", "",
        "| family | pairs | groups | descriptor at the threshold | pHash |", "|---|---:|---:|---:|---:|",
    ]
    for fam, v in g["recall_by_family"].items():
        lines.append(f"| {fam} | {v['n']} | {v['recall']:.3f} | {d['recall_by_family'][fam]['recall']:.3f} | "
                     f"{p['recall_by_family'][fam]['recall']:.3f} |")
    lines += ["", "| severity | pairs | groups |", "|---|---:|---:|"]
    lines += [f"| {s} | {v['n']} | {v['recall']:.3f} |" for s, v in g["recall_by_severity"].items()]
    ch = r.get("chaining")
    if ch:
        lines += ["", "What the no-chaining rule costs: the generation's confirmed pairs at the near-duplicate threshold "
                  "(pairs.npz: descriptor, verified and asked pairs; the pairs that grouping verifies inside small components "
                  "are not stored there) and two ways of grouping them that chain. The published groups "
                  "need every pair of members confirmed; star groups need each member confirmed with the group's centre "
                  "(greedy: the file with the most free partners first); components take any chain. "
                  f"Truth: {ch['tile_copy_pairs']} tile-copy pairs, {ch['copy_copy_pairs']} copy-copy pairs.", "",
                  "| pairs from | called | wrong | precision | recall | tile-copy recall | copy-copy recall |",
                  "|---|---:|---:|---:|---:|---:|---:|"]
        for key, label in (("groups", "the published groups"), ("confirmed", "the confirmed pairs alone"),
                           ("star", "star groups over them"), ("components", "connected components (chaining)")):
            v = ch[key]
            lines.append(f"| {label} | {v['called']} | {v['wrong']} | {_pct(v['precision'])} | {v['recall']:.3f} | "
                         f"{v['recall_tile_copy']:.3f} | {v['recall_copy_copy']:.3f} |")
    kinds = Counter(w["kind"] for w in g["wrong"])
    lines += ["", f"Wrong pairs in groups: {len(g['wrong'])} ({', '.join(f'{k}: {n}' for k, n in kinds.items()) or 'none'})."]
    lines += [f"- {w['pair'][0]} / {w['pair'][1]} ({w['kind']})" for w in g["wrong"][:15]]
    lines += ["", f"Wall time {r['wall_s']} s. Nothing here is asserted by a test."]
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--work", type=Path, required=True, help="a bench_quality --work folder")
    parser.add_argument("--store", default="train-10min", help="its store whose model is used")
    parser.add_argument("--per-transform", type=int, default=8, help="copies planted per transform")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=Path(__file__).parent / "results" / "groups-real.md")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="a setting for the index run (e.g. shared_part=0), as NEARSIGHT_SHARED_PART=0 gives `nearsight index`")
    args = parser.parse_args()
    from benchmarks import bench_quality

    bench_quality.SETTINGS_OVERRIDES.update(dict(item.split("=", 1) for item in args.set))
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    result = run(args)
    (args.work / "groups" / "results.json").write_text(json.dumps(result, indent=1, default=str))
    write_report(args.out, render(result))
    print("\n".join(render(result)[:20]))


if __name__ == "__main__":
    main()
