"""What each `nearsight` command does once its arguments are parsed: call indexer, print the result.

Human output is a short table; `--json` output is machine-readable. Nothing
here holds domain logic.
"""

from __future__ import annotations

import io
import json
import sys
from pathlib import Path
from typing import Sequence

from .settings import describe as describe_settings
from .settings import load_settings
from .store import Store, resolve_store_path

SETTING_FLAGS = ("workers", "train_minutes", "near_threshold", "similar_threshold")


def print_json(obj) -> None:
    print(json.dumps(obj, sort_keys=True))


def human_bytes(n: int) -> str:
    size = float(n)
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if size < 1024 or unit == "TB":
            return f"{size:.0f} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1024
    return f"{n} B"


def print_table(rows: Sequence[tuple[str, object]]) -> None:
    width = max(len(k) for k, _ in rows)
    for key, value in rows:
        print(f"  {key:<{width}}  {value}")


def open_store(args, *, create: bool = False) -> Store:
    root = resolve_store_path(args.store)
    overrides = {name: getattr(args, name, None) for name in SETTING_FLAGS}
    settings = load_settings(store_dir=root, config_file=args.config, overrides=overrides)
    return Store.open(root, create=create, settings=settings)


def _progress(args) -> bool | None:
    return False if getattr(args, "no_progress", False) else None


def train_config(args, **extra):
    """A TrainConfig from the training flags that were given (the rest keep their defaults)."""
    from .train import TrainConfig

    given = {name: getattr(args, name, None) for name in
             ("arch", "dim", "size", "batch_size", "temperature", "queue_len", "minutes", "epochs", "seed")}
    values = {k: v for k, v in {**given, **extra}.items() if v is not None}
    if "epochs" in values and "minutes" not in values:
        values["minutes"] = None  # an explicit epoch budget replaces the default time budget
    return TrainConfig(**values)


# -- index, status --------------------------------------------------------------------
def cmd_index(args) -> int:
    from .pipeline import run_index

    with open_store(args, create=True) as store:
        config = train_config(args, minutes=store.settings.train_minutes)
        summary = run_index(store, args.folders, progress=_progress(args), train_config=config,
                            build=not args.scan_only, index_spec=args.index_spec)
    if args.json:
        print_json(summary)
        return 0
    print(f"indexed {len(args.folders)} folder(s) into {resolve_store_path(args.store)}")
    print_table([(k, summary[k]) for k in ("new", "changed", "unchanged", "unreadable", "removed", "ignored", "same_bytes", "embedded")])
    if summary["unreadable_reasons"]:
        reasons = ", ".join(f"{code} {n}" for code, n in summary["unreadable_reasons"].items())
        print(f"  unreadable files by reason: {reasons} (`nearsight status --unreadable` lists them)")
    if summary.get("trained"):
        _print_heldout(summary["trained"]["heldout"], summary["trained"]["heldout_random_init"])
    if summary.get("generation"):
        g = summary["groups"]
        print(f"  published generation {summary['generation']}: {summary['indexed']} images, "
              f"{g['groups']} groups, {human_bytes(g['reclaimable_bytes'])} reclaimable")
    return 0


def cmd_status(args) -> int:
    from .pipeline import store_status

    with open_store(args) as store:
        status = store_status(store)
        unreadable = store.catalog.unreadable_files(limit=None if args.unreadable else 0)
    if args.json:
        if args.unreadable:
            status["unreadable_files"] = unreadable
        print_json(status)
        return 0
    print(f"store {status['store']} (catalog schema {status['schema_version']})")
    gen = status["generation"]
    print_table([
        ("source folders", status["sources"]),
        ("image files", status["files"]),
        ("readable", status["ok"]),
        ("unreadable", status["unreadable"]),
        ("removed since seen", status["removed"]),
        ("distinct contents", status["distinct_contents"]),
        ("same-bytes groups", status["same_bytes_groups"]),
        ("bytes (readable)", human_bytes(status["bytes"])),
        ("model", status["model"] or "none yet"),
        ("generation", f"{gen['name']} ({gen['indexed']} images, {gen['groups']['groups']} groups)" if gen else "none yet"),
    ])
    for root in status["source_folders"]:
        print(f"  source: {root}")
    for row in unreadable:
        print(f"  unreadable  {Path(row['root']) / row['relpath']}  ({row['reason']})")
    return 0


# -- train ---------------------------------------------------------------------------------
def _print_heldout(trained: dict, random_init: dict) -> None:
    print(f"  held-out check: recall@1 {trained['recall_at_1']:.3f} (random init {random_init['recall_at_1']:.3f}), "
          f"mean rank {trained['mean_rank']:.2f} (random init {random_init['mean_rank']:.2f})")


def cmd_train(args) -> int:
    from .models import fine_tune_into_store, train_into_store
    from .pipeline import run_index

    with open_store(args, create=bool(args.folders)) as store:
        if args.folders:
            run_index(store, args.folders, progress=_progress(args), build=False)
        with store.lock():
            if args.from_verdicts:
                from .train import read_verdicts_csv

                result = fine_tune_into_store(store, read_verdicts_csv(Path(args.from_verdicts)), progress=_progress(args))
                out = {"model": result.version, "fine_tuned_from": result.fine_tuned_from, "steps": result.steps,
                       "pairs_used": result.pairs_used, "pairs_skipped": result.pairs_skipped,
                       "before": result.before, "after": result.after}
            else:
                result = train_into_store(store, train_config(args), resume=args.resume, progress=_progress(args))
                out = {"model": result.version, "steps": result.steps, "stopped_by": result.stopped_by,
                       "images": result.images_used, "unreadable": len(result.skipped),
                       "final_loss": result.final_loss, "images_per_s": result.images_per_s,
                       "heldout": result.heldout, "heldout_random_init": result.heldout_random_init}
    if args.json:
        print_json(out)
        return 0
    print(f"trained model {out['model']} ({out['steps']} steps); it is now the store's current model")
    if "heldout" in out:
        _print_heldout(out["heldout"], out["heldout_random_init"])
    print("next: `nearsight index FOLDER` embeds the collection with it and publishes a new generation")
    return 0


# -- similar, groups -------------------------------------------------------------------------
def cmd_similar(args) -> int:
    from .query import Searcher, expand_queries

    with open_store(args) as store:
        searcher = Searcher(store)
        queries = expand_queries(args.paths, store.settings.extensions)
        failed = 0
        for answer in searcher.similar_files(queries, args.k, args.threshold):
            failed += "error" in answer
            if args.json:
                print_json(answer)
            else:
                _print_answer(answer)
    return 1 if failed and failed == len(queries) else 0


def _print_answer(answer: dict) -> None:
    print(f"query: {answer['query']}")
    if "error" in answer:
        print(f"  error: {answer['error']['message']}")
        return
    if not answer["results"]:
        print("  (no results)")
    for rank, r in enumerate(answer["results"], 1):
        mark = "duplicate" if r["duplicate"] else ""
        print(f"  {rank:>3}  {r['similarity']:.3f}  {mark:<9}  #{r['id']}  {r['path']}")


def cmd_groups(args) -> int:
    from .generations import require_current
    from .groups import Group, groups_to_csv, groups_to_json, summarize

    with open_store(args) as store:
        gen = require_current(store)
        if args.threshold is not None:
            from .build import compute_groups, load_vectors

            ids, xb = load_vectors(store, gen.meta["model"])
            xb = gen.load_whitening().apply(xb)
            groups = compute_groups(store, gen.load_index(), ids, xb, t_near=args.threshold, t_similar=args.threshold)
        else:
            groups = [Group.from_dict(g) for g in gen.load_groups()["groups"]]
        if args.tier:
            groups = [g for g in groups if g.tier == args.tier]
        buf = io.StringIO()
        if args.format == "json":
            groups_to_json(groups, buf)
        elif args.format == "csv":
            groups_to_csv(groups, buf)
        elif args.format == "html":
            from .report import write_html_report

            out = Path(args.out or store.reports_dir / f"groups-{gen.name}.html")
            write_html_report(groups, out, thumbnail=_thumbnail_reader(store), title="nearsight: duplicate groups",
                              summary={"store": str(store.root), "generation": gen.name,
                                       "near-duplicate threshold": gen.meta["thresholds"]["near"],
                                       "similar threshold": gen.meta["thresholds"]["similar"],
                                       "thresholds from": gen.meta["thresholds"]["source"]})
            print(f"wrote {out} ({len(groups)} groups)")
            return 0
        else:
            _groups_table(groups, summarize(groups), buf)
    _emit(buf.getvalue(), args.out)
    return 0


def _thumbnail_reader(store: Store):
    meta_cache: dict[int, str] = {}

    def thumbnail(file_id: int) -> bytes | None:
        if not meta_cache:
            meta_cache.update({i: m["content_hash"] for i, m in store.catalog.image_meta().items()})
        digest = meta_cache.get(file_id)
        path = store.thumb_path(digest) if digest else None
        return path.read_bytes() if path and path.is_file() else None

    return thumbnail


def _groups_table(groups, summary: dict, out) -> None:
    out.write(f"{summary['groups']} groups, {summary['files_in_groups']} files, "
              f"{human_bytes(summary['reclaimable_bytes'])} reclaimable\n")
    for g in groups:
        out.write(f"\ngroup {g.gid}  {g.tier}  {g.size} files\n")
        for m in g.members:
            role = "keep" if m.id == g.keeper else "    "
            out.write(f"  {role}  {m.similarity:.3f}  {m.tier:<14}  {m.meta.width}x{m.meta.height}  "
                      f"{human_bytes(m.meta.file_size):>9}  {m.meta.path}\n")


def _emit(text: str, out: str | None) -> None:
    if out:
        from .fsutil import atomic_write_text

        atomic_write_text(Path(out), text)
        print(f"wrote {out}", file=sys.stderr)
    else:
        sys.stdout.write(text)


# -- demo, settings -----------------------------------------------------------------------------
def cmd_demo(args) -> int:
    from .demo import run_demo

    report = run_demo(Path(args.out), seed=args.seed, originals=args.originals, progress=_progress(args),
                      train_minutes=args.train_minutes)
    if args.json:
        print_json(report)
    else:
        for line in report["lines"]:
            print(line)
    return 0


def cmd_settings(args) -> int:
    settings = load_settings(store_dir=resolve_store_path(args.store), config_file=args.config)
    rows = [dict(row, value=settings[row["name"]], source=settings.source(row["name"])) for row in describe_settings()]
    if args.json:
        print_json([{k: (list(v) if isinstance(v, tuple) else v) for k, v in r.items()} for r in rows])
        return 0
    for row in rows:
        value = ",".join(row["value"]) if isinstance(row["value"], tuple) else row["value"]
        print(f"{row['name']} = {value}   [{row['source']}; env {row['env']}]")
        print(f"    {row['help']}")
    return 0
