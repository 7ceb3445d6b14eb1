"""The quality benchmark's Markdown report, from the figures bench_quality.py gathered."""

from __future__ import annotations

import math

from benchmarks.collection import KINDS
from benchmarks.protocol import ADDED_FAMILIES, EARLIER, FAMILIES, SEVERITY_LEVELS

METRICS = (("uap", "µAP"), ("r1", "recall@1"), ("r_p90", "recall at precision 0.90"),
           ("r_p99", "recall at precision 0.99"))
KIND_LABELS = {"everyday": "everyday photographs", "astro": "astrophotographs"}


def _f(x, digits: int = 3) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.{digits}f}"


def _wilson(k: int, n: int) -> str:
    from nearsight.indexer.core.rates import wilson_interval

    if n == 0:
        return "n/a"
    lo, hi = wilson_interval(k, n)
    return f"{float(lo):.3f}-{float(hi):.3f}"


def _families(results: dict) -> list[str]:
    present = {f for _t, f, _s in results["queries"]["transforms"]}
    return [f for f in FAMILIES if f in present]


def _family_severities(results: dict) -> list[str]:
    """'family / severity' labels present, in protocol order."""
    present = {f"{f} / {s}" for _t, f, s in results["queries"]["transforms"]}
    return [f"{f} / {s}" for f in FAMILIES for s in SEVERITY_LEVELS if f"{f} / {s}" in present]


def _sources_table(results: dict) -> list[str]:
    lines = ["| source | installed by | kind | photos | tiles | indexed | held out |", "|---|---|---|---:|---:|---:|---:|"]
    for s in results["collection"]["sources"]:
        kinds = ", ".join(KIND_LABELS.get(k, k) for k in s["kinds"]) or "-"
        lines.append(f"| {s['key']} | {s['package']} | {kinds} | {s['photos']} | {s['tiles']} | {s['indexed']} | "
                     f"{s['held_out']} |")
    c = results["collection"]
    lines.append(f"| all | | | {sum(s['photos'] for s in c['sources'])} | {c['photo_tiles']} | {c['indexed_tiles']} | "
                 f"{c['photo_tiles'] - c['indexed_tiles']} |")
    return lines


def _runs_table(results: dict) -> list[str]:
    lines = ["| system | training budget | steps reached | held-out recall@1 (trained / random init) | "
             "load average before / after | index run wall time (s) |", "|---|---:|---:|---|---|---:|"]
    for name, run in results["runs"].items():
        held = run.get("heldout") or {}
        rand = run.get("heldout_random_init") or {}
        held_s = "n/a" if not held else f"{_f(held.get('recall_at_1'))} / {_f(rand.get('recall_at_1'))}"
        load = (f"{run['load_before']:.2f} / {run['load_after']:.2f}" if "load_before" in run else "n/a")
        lines.append(f"| {name} | {run['budget_minutes']:g} min | {run['steps']} | {held_s} | {load} | {run['wall_s']:.0f} |")
    return lines


def _overall_table(results: dict, scope: str | None = None) -> list[str]:
    """The overall figures of every system; with `scope`, over that label of the "scope" grouping only."""
    lines = ["| system | " + " | ".join(label for _k, label in METRICS) + " |", "|---|" + "---:|" * len(METRICS)]
    for name, entry in results["systems"].items():
        m = entry["metrics"]["overall"] if scope is None else entry["metrics"]["scope"][scope]
        lines.append(f"| {name} | " + " | ".join(_f(m[k]) for k, _label in METRICS) + " |")
    return lines


def _earlier_scope(results: dict) -> list[str]:
    """The overall table over the families reports had before families were added, when some were."""
    first = next(iter(results["systems"].values()))["metrics"]
    scopes = first.get("scope", {})
    if EARLIER not in scopes or len(scopes) < 2:
        return []
    return ["", f"Without the families added on 2026-12-04 ({', '.join(ADDED_FAMILIES)}; "
            f"{scopes[EARLIER]['queries']} queries), comparable with earlier reports:", "",
            *_overall_table(results, EARLIER)]


def _per_group_table(results: dict, key: str, groups: list[str], metric: str, labels: dict | None = None,
                     heading: str | None = None) -> list[str]:
    """One row per group label (absent ones skipped), one column per system."""
    systems = list(results["systems"])
    lines = [f"| {heading or key} | queries (with a match) | " + " | ".join(systems) + " |",
             "|---|---:|" + "---:|" * len(systems)]
    for g in groups:
        first = results["systems"][systems[0]]["metrics"][key].get(g)
        if first is None:
            continue
        cells = [_f(results["systems"][s]["metrics"][key][g][metric]) for s in systems]
        lines.append(f"| {(labels or {}).get(g, g)} | {first['queries']} ({first['positives']}) | "
                     + " | ".join(cells) + " |")
    return lines


def _target_and_estimate(name: str, cal: dict | None) -> tuple[str, str]:
    if not cal:
        return ("pHash cut, Hamming <= 10" if name == "phash" else "none"), "n/a"
    unmet = "" if cal.get("target_met") else " (target not confirmed)"
    if cal.get("question") == "query":
        return (f"false flags <= {cal['target_false_flag_rate']:.0%} of queries",
                f"false flags {_f(cal['estimated_false_flag_rate'])} / recall {_f(cal['estimated_recall'])}{unmet}")
    return _f(cal["target"], 2), f"precision {_f(cal['estimated_precision'])} / recall {_f(cal['estimated_recall'])}{unmet}"


def _verdict_table(results: dict) -> list[str]:
    lines = ["| system | threshold | target | calibration's estimate | called | correct | "
             "realised precision (95 % Wilson) | realised recall | best recall at precision 0.99 (any threshold) | "
             "queries without a match flagged |",
             "|---|---:|---|---|---:|---:|---|---:|---:|---|"]
    for name, entry in results["systems"].items():
        if "verdict" not in entry:
            continue
        v = entry["verdict"]["overall"]
        target, estimate = _target_and_estimate(name, entry.get("calibration"))
        flagged = v.get("no_match_flagged")
        flagged_text = "n/a" if flagged is None else (f"{flagged['flagged']} of {flagged['queries']}: {_f(flagged['rate'])} "
                                                      f"({_wilson(flagged['flagged'], flagged['queries'])})")
        lines.append(f"| {name} | {v['threshold']:.3f} | {target} | {estimate} | {v['called']} | {v['correct']} | "
                     f"{_f(v['precision'])} ({_wilson(v['correct'], v['called'])}) | {_f(v['recall'])} | "
                     f"{_f(v.get('best_recall_at_p99'))} | {flagged_text} |")
    for name, entry in results["systems"].items():
        groups = (entry.get("calibration") or {}).get("groups")
        if groups:
            lines += ["", f"{name}, what its calibration said about the collection: {groups}"]
    return lines


def _wrong_calls_table(results: dict) -> list[str]:
    kinds = ("tile of the same photo", "another photo", "distractor", "for queries without a match")
    lines = ["| system | wrong calls | " + " | ".join(kinds) + " |", "|---|---:|" + "---:|" * len(kinds)]
    for name, entry in results["systems"].items():
        w = entry.get("wrong_calls")
        if w is None:
            continue
        lines.append(f"| {name} | {entry['verdict']['overall']['called'] - entry['verdict']['overall']['correct']} | "
                     + " | ".join(str(w[k]) for k in kinds) + " |")
    return lines


def _verdict_families(results: dict, system: str, families: list[str]) -> list[str]:
    entry = results["systems"][system]["verdict"]
    lines = ["| family | queries with a match | called | correct | realised precision (95 % Wilson) | realised recall |",
             "|---|---:|---:|---:|---|---:|"]
    for f in ["overall", *families]:
        v = entry[f]
        lines.append(f"| {f} | {v['positives']} | {v['called']} | {v['correct']} | {_f(v['precision'])} "
                     f"({_wilson(v['correct'], v['called'])}) | {_f(v['recall'])} |")
    return lines


def render(results: dict, command: str) -> str:
    c, q = results["collection"], results["queries"]
    families = _families(results)
    trained = [s for s in results["systems"] if s.startswith("nearsight") and "untrained" not in s]
    best = trained[-1] if trained else None
    severity_of = {t: sev for t, _f2, sev in q["transforms"]}
    lines = [
        "# Copy-detection quality: nearsight against pHash and a thumbnail baseline",
        "",
        f"Machine (start): {results['machine']}",
        f"Machine (end): {results['machine_end']}",
        "",
        f"Command: `{command}` ({results['wall_s'] / 60:.0f} minutes wall time).",
        "",
        f"Collection indexed: {c['files']} files = {c['indexed_tiles']} photo tiles + {c['distractors']} distractors "
        "(originals and look-alikes of the invented demo archive). Photo tiles: non-overlapping tiles (at most 3 x 3 "
        "per photo, at least 224 px a side; smaller photos whole) of real photographs that PyPI and Debian packages "
        "ship (benchmarks/collection.py says which files and why); a seeded quarter of each kind's tiles is kept out "
        "of the index:",
        "",
        *_sources_table(results),
        "",
        f"Queries: {q['total']} = {len(q['transforms'])} transforms x {q['per_transform']} tiles, each transform "
        "applied to its own seeded sample of tiles, half of them everyday photographs and half astrophotographs "
        "(which supply more of the tiles), a quarter of each half from tiles kept out of the index. "
        f"{q['with_match']} queries have their original in the index, the other {q['total'] - q['with_match']} have "
        "none (every prediction for them is false). Protocol: benchmarks/protocol.py (Copydays-style JPEG ladder, "
        "crops and strong combinations; ImageNet-C corruptions at severities 1-3; overlays, borders, flips, "
        "rotations; the mild / moderate / strong grading of each family is stated there).",
        "Every system returns its top 10 per query; metrics in benchmarks/metrics.py (µAP as defined for DISC21, "
        "Douze et al. 2021: all predictions pooled and ranked by score, recall over the queries that have a match).",
        "",
        "## Training runs",
        "",
        *_runs_table(results),
        "",
        "## Overall",
        "",
        *_overall_table(results),
        *_earlier_scope(results),
        "",
        "## µAP per kind of photograph",
        "",
        *_per_group_table(results, "kind", list(KINDS), "uap", KIND_LABELS, heading="kind"),
        "",
        "## µAP per severity",
        "",
        *_per_group_table(results, "severity", list(SEVERITY_LEVELS), "uap"),
        "",
        "## µAP per transformation family",
        "",
        *_per_group_table(results, "family", families, "uap"),
        "",
        "## recall@1 per transformation family",
        "",
        *_per_group_table(results, "family", families, "r1"),
        "",
        "## µAP per family and severity",
        "",
        *_per_group_table(results, "family_severity", _family_severities(results), "uap",
                          heading="family / severity"),
        "",
        "## The calibrated `duplicate` verdict, realised",
        "",
        "nearsight calls a result a duplicate when its similarity reaches the generation's query verdict "
        "threshold (calibrated so that at most the stated share of queries whose original is not indexed get a "
        "flag, on the collection's own images and synthetic copies; indexer/matching/query_verdict.py). Realised here on "
        "every top-10 prediction of every query. pHash has no calibration; its row uses the common Hamming <= 10 "
        "cut for comparison.",
        "",
        *_verdict_table(results),
    ]
    if any("wrong_calls" in e for e in results["systems"].values()):
        lines += ["", "What the wrong calls were (the last column counts the calls made for queries whose original "
                  "is not indexed, whatever they called):", "", *_wrong_calls_table(results)]
    if best:
        lines += ["", f"### Per family, {best}", "", *_verdict_families(results, best, families)]
    if results.get("ablation"):
        from benchmarks.ablation import table

        a = results["ablation"]
        lines += ["", "## Ablation: scoring levers on the same trained model", "",
                  f"Model {a['model']} ({a['budget_minutes']:g} min of training), the collection and queries re-described "
                  "once and scored exhaustively under every combination (benchmarks/ablation.py). \"no-match flagged "
                  "@P99\" is the share of queries whose original is not indexed whose top score reaches the threshold "
                  "where pooled precision is 0.99.", "", table(a["figures"])]
    transform_labels = {t: f"{t} ({sev})" for t, sev in severity_of.items()}
    lines += ["", "## µAP per transform", "",
              *_per_group_table(results, "transform", list(severity_of), "uap", transform_labels), ""]
    return "\n".join(lines)
