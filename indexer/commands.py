"""What each `nearsight` command does once its arguments are parsed: call indexer, print the result.

Human output is a short table; `--json` output is machine-readable. Nothing
here holds domain logic.
"""

from __future__ import annotations

import io
import json
import os
import sys
from pathlib import Path
from typing import Sequence

from .core.errors import UsageError
from .core.fsutil import human_bytes
from .core.settings import describe as describe_settings
from .core.settings import load_settings
from .storage.store import ENV_STORE, Store, resolve_store_path

SETTING_FLAGS = ("workers", "train_minutes", "near_threshold", "similar_threshold",
                 "serve_host", "serve_port", "serve_threads", "keep_paths", "prefer_folders", "prefer_formats")


def print_json(obj) -> None:
    print(json.dumps(obj, sort_keys=True))


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
    from .learning.train import TrainConfig

    given = {name: getattr(args, name, None) for name in
             ("arch", "dim", "size", "batch_size", "temperature", "queue_len", "minutes", "epochs", "seed")}
    return TrainConfig.from_options(**{**given, **{k: v for k, v in extra.items() if v is not None}})


# -- index, status --------------------------------------------------------------------
def cmd_index(args) -> int:
    from .building.pipeline import run_index
    from .reading.scan import check_folders

    check_folders(args.folders)  # before the store is created: a mistyped folder leaves nothing behind
    with open_store(args, create=True) as store:
        # --epochs alone replaces the time budget, as in `train`; --train-minutes with it keeps both.
        minutes = None if args.epochs is not None and args.train_minutes is None else store.settings.train_minutes
        config = train_config(args, minutes=minutes, max_images=store.settings.train_sample)
        summary = run_index(store, args.folders, progress=_progress(args), train_config=config,
                            build=not args.scan_only, index_spec=args.index_spec,
                            calibrate=not args.no_calibrate, retrain=args.retrain, cluster=args.cluster)
    if args.json:
        print_json(summary)
        return 0
    print(f"indexed {len(args.folders)} folder(s) into {resolve_store_path(args.store)}")
    print_table([(k, summary[k]) for k in ("new", "changed", "moved", "unchanged", "unreadable", "removed", "ignored",
                                           "same_bytes", "embedded")])
    if summary["unreadable_reasons"]:
        reasons = ", ".join(f"{code} {n}" for code, n in summary["unreadable_reasons"].items())
        print(f"  unreadable files by reason: {reasons} (`nearsight status --unreadable` lists them)")
    if summary.get("trained"):
        _print_heldout(summary["trained"]["heldout"], summary["trained"]["heldout_random_init"])
    if summary.get("generation"):
        g = summary["groups"]
        print(f"  published generation {summary['generation']}: {summary['indexed']} images, "
              f"{g['groups']} groups, {human_bytes(g['reclaimable_bytes'])} reclaimable")
        build = summary.get("build") or {}
        print(f"  {build.get('kind', 'full')} build ({build.get('reason', '')}); groups: "
              + ", ".join(f"{k} {v}" for k, v in summary.get("group_changes", {}).items() if v))
    return 0


def cmd_calibrate(args) -> int:
    from .building.refresh import make_generation
    from .calibration.calibrate import CalibrationConfig

    with open_store(args) as store, store.lock():
        settings = store.settings
        config = CalibrationConfig.from_settings(settings, target_precision=args.target_precision,
                                                 similar_target_precision=args.similar_target_precision)
        out = make_generation(store, build="recalibrate", calibration=config)
        gen_dir = store.generations_dir / out["generation"]
        calibration = json.loads((gen_dir / "calibration.json").read_text("utf-8"))
    if args.json:
        print_json({"generation": out["generation"], "summary": calibration["summary"],
                    "tiers": {name: {k: v for k, v in tier.items() if k not in ("curve", "fit")}
                              for name, tier in calibration["tiers"].items()},
                    "plot": str(gen_dir / "calibration.png")})
        return 0
    for line in calibration["summary"]["lines"]:
        print(line)
    print(f"published generation {out['generation']} with these thresholds; plot: {gen_dir / 'calibration.png'}")
    return 0


def cmd_verdicts(args) -> int:
    from .calibration.verdicts import import_csv

    with open_store(args) as store:
        if args.action == "import":
            if not args.file:
                raise UsageError("`verdicts import` needs the CSV file to read")
            stored = import_csv(store, Path(args.file), author=args.author)
            print(f"stored {stored} verdicts; `groups` and `quarantine` apply them now, `calibrate` uses them")
            return 0
        latest = store.catalog.latest_verdicts()
    counts = {"pairs": len(latest), "same": sum(v["verdict"] == "same" for v in latest)}
    counts["different"] = counts["pairs"] - counts["same"]
    if args.json:
        print_json(counts)
    else:
        print(f"{counts['pairs']} judged pairs: {counts['same']} same, {counts['different']} different")
    return 0


def cmd_status(args) -> int:
    from .building.pipeline import store_status

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
        ("quarantined", status.get("quarantined", 0)),
        ("distinct contents", status["distinct_contents"]),
        ("same-bytes groups", status["same_bytes_groups"]),
        ("bytes (readable)", human_bytes(status["bytes"])),
        ("model", status["model"] or "none yet"),
        ("generation", f"{gen['name']} ({gen['indexed']} images, {gen['groups']['groups']} groups)" if gen else "none yet"),
    ])
    for name, answer in ((gen or {}).get("questions") or {}).items():
        print(f"  {name}: {answer['text']}")
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
    from .building.pipeline import run_index
    from .learning.models import fine_tune_into_store, train_into_store

    with open_store(args, create=bool(args.folders)) as store:
        if args.folders:
            run_index(store, args.folders, progress=_progress(args), build=False)
        with store.lock():
            if args.from_verdicts or args.from_stored_verdicts:
                from .calibration.verdicts import stored_verdict_pairs, verdict_file_pairs

                pairs = (verdict_file_pairs(store, Path(args.from_verdicts)) if args.from_verdicts
                         else stored_verdict_pairs(store.catalog))
                result = fine_tune_into_store(store, pairs, progress=_progress(args))
                out = {"model": result.version, "fine_tuned_from": result.fine_tuned_from, "steps": result.steps,
                       "pairs_used": result.pairs_used, "pairs_skipped": result.pairs_skipped,
                       "before": result.before, "after": result.after}
            else:
                config = train_config(args, max_images=store.settings.train_sample)
                result = train_into_store(store, config, resume=args.resume, progress=_progress(args))
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
    from .matching.query import Searcher, expand_queries

    with open_store(args) as store:
        searcher = Searcher(store)
        queries = expand_queries(args.paths, store.settings.extensions)
        failed = 0
        threshold = _threshold_arg(args, searcher.generation)
        for answer in searcher.similar_files(queries, args.k, threshold):
            failed += "error" in answer
            if args.json:
                print_json(answer)
            else:
                _print_answer(answer)
    return 1 if failed and failed == len(queries) else 0


CHECK_COLUMNS = ("path", "verdict", "match_id", "match_path", "similarity", "probability", "verified", "reason")


def _check_row(answer) -> dict:
    match, error = answer.match or {}, answer.error or {}
    evidence = match.get("evidence") or {}
    return {"path": answer.path, "verdict": answer.verdict, "match_id": match.get("id"),
            "match_path": match.get("path"), "similarity": match.get("similarity"),
            "probability": match.get("probability"),
            "verified": evidence.get("verified", evidence.get("same_bytes")), "reason": error.get("reason")}


def cmd_check(args) -> int:
    import csv

    from .check import VERDICTS, check_files
    from .matching.query import Searcher, expand_queries

    args.json, args.csv = args.json or args.format == "json", args.csv or args.format == "csv"
    if args.out and args.format != "html":
        raise UsageError("--out is for --format html; other formats go to standard output")
    with open_store(args) as store:
        searcher = Searcher(store)
        paths = expand_queries(args.paths, store.settings.extensions)
        threshold = _threshold_arg(args, searcher.generation)
        counts = dict.fromkeys(VERDICTS, 0)
        writer = csv.DictWriter(sys.stdout, CHECK_COLUMNS, lineterminator="\n") if args.csv else None
        if writer:
            writer.writeheader()
        answers = []
        for answer in check_files(searcher, paths, threshold=threshold):
            counts[answer.verdict] += 1
            if args.format == "html":
                answers.append(answer)
            elif args.json:
                print_json(answer.to_dict())
            elif writer:
                writer.writerow(_check_row(answer))
            else:
                row = _check_row(answer)
                if answer.verdict == "unreadable":
                    detail = answer.error["message"]
                elif answer.match:
                    chance = "" if row["probability"] is None else f", p={row['probability']:.2f}"
                    detail = f"{row['similarity']:.3f}{chance}  #{row['match_id']}  {row['match_path']}"
                else:
                    detail = ""
                print(f"{answer.verdict:<10}  {answer.path}  {detail}".rstrip())
            sys.stdout.flush()
        if args.format == "html":
            from .acting.report import write_check_report

            out = Path(args.out or "nearsight-check.html")
            write_check_report(answers, out, read_given=given_thumbnail, thumbnail=_thumbnail_reader(store),
                               title="nearsight: new material checked against the archive",
                               summary={"store": str(store.root), "generation": searcher.generation.name
                                        if searcher.generation else "none"})
            print(f"wrote {out} ({len(answers)} files)")
    if not (args.json or args.csv):
        print(", ".join(f"{n} {v}" for v, n in counts.items()), file=sys.stderr)
    if args.fail_on == "copy" and counts["copy"]:
        return 1
    if args.fail_on == "similar" and (counts["copy"] or counts["similar"]):
        return 1
    return 1 if paths and counts["unreadable"] == len(paths) else 0


def _threshold_arg(args, gen) -> float | None:
    """--threshold as given, or the calibrated threshold for --precision; None for the generation's own."""
    return gen.asked_threshold(args.threshold, args.precision)


def _print_answer(answer: dict) -> None:
    print(f"query: {answer['query']}")
    if "error" in answer:
        print(f"  error: {answer['error']['message']}")
        return
    if not answer["results"]:
        print("  (no results)")
    for rank, r in enumerate(answer["results"], 1):
        mark = "duplicate" if r["duplicate"] else ""
        chance = "" if r.get("probability") is None else f"p={r['probability']:.2f}"
        print(f"  {rank:>3}  {r['similarity']:.3f}  {chance:<6}  {mark:<9}  #{r['id']}  {r['path']}")


def cmd_groups(args) -> int:
    from .building.verdict_groups import current_groups
    from .matching.groups import groups_to_csv, groups_to_json, summarize

    with open_store(args) as store:
        now = current_groups(store, threshold=args.threshold, precision=args.precision)
        gen, groups = now.generation, now.groups
        if args.tier:
            groups = [g for g in groups if g.tier == args.tier]
        buf = io.StringIO()
        if args.format in ("keep-list", "drop-list"):
            from .acting.keepers import KeeperRules
            from .acting.keeplist import keep_and_drop, write_drop_list, write_keep_list
            from .acting.plan import plan_quarantine

            # The groups' weakest tier acted on is the plan's default (near-duplicate); --tier narrows it.
            tier = args.tier if args.tier in ("same-bytes", "same-pixels", "person-same", "near-duplicate") else None
            plan = plan_quarantine(store, tier=tier, threshold=args.threshold, precision=args.precision,
                                   rules=KeeperRules.from_settings(store.settings))
            keep, drop = keep_and_drop(store, plan)
            if args.out and str(args.out).lower().endswith(".parquet"):
                from .acting.keeplist import DROP_COLUMNS, KEEP_COLUMNS, write_parquet

                if args.format == "keep-list":
                    write_parquet([{"path": p} for p in keep], KEEP_COLUMNS, Path(args.out))
                else:
                    write_parquet(drop, DROP_COLUMNS, Path(args.out))
                print(f"wrote {args.out}", file=sys.stderr)
                return 0
            if args.format == "keep-list":
                write_keep_list(keep, buf)
            else:
                write_drop_list(drop, buf)
        elif args.format == "json":
            groups_to_json(groups, buf)
        elif args.format == "csv":
            groups_to_csv(groups, buf)
        elif args.format == "html":
            from .acting.explain import group_explainer
            from .acting.report import write_html_report
            from .calibration.calibration_report import questions

            out = Path(args.out or store.reports_dir / f"groups-{gen.name}.html")
            summary = {"store": str(store.root), "generation": gen.name,
                       "near-duplicate threshold": gen.meta["thresholds"]["near"],
                       "similar threshold": gen.meta["thresholds"]["similar"],
                       "thresholds from": gen.meta["thresholds"]["source"]}
            for name, answer in (questions(gen.load_calibration()) or {}).items():
                summary[f"{name}: {answer['question']}"] = answer["text"]
            write_html_report(groups, out, thumbnail=_thumbnail_reader(store), title="nearsight: duplicate groups",
                              summary=summary, explain=group_explainer(store, gen.meta["model"],
                                                                       gen.load_whitening(), now.verdicts))
            print(f"wrote {out} ({len(groups)} groups)")
            return 0
        else:
            _groups_table(groups, summarize(groups), buf)
    _emit(buf.getvalue(), args.out)
    return 0


def given_thumbnail(path: str) -> bytes | None:
    """A report's thumbnail of a file that is not in the store (`check`): a JPEG of at most 256 px."""
    import io

    from .reading.images import read_image

    im, _ = read_image(path, max_side=256)
    out = io.BytesIO()
    im.save(out, format="JPEG", quality=85)
    return out.getvalue()


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
        from .core.fsutil import atomic_write_text

        atomic_write_text(Path(out), text)
        print(f"wrote {out}", file=sys.stderr)
    else:
        sys.stdout.write(text)


# -- serve ---------------------------------------------------------------------------------------
def cmd_serve(args) -> int:
    from nearsight.service.server import run_server

    with open_store(args) as store:
        root, settings = store.root, store.settings
    return run_server(root, settings)


# -- quarantine, restore -------------------------------------------------------------------------
def cmd_quarantine(args) -> int:
    from .acting.keepers import KeeperRules
    from .acting.plan import plan_quarantine
    from .acting.quarantine import apply_quarantine

    with open_store(args) as store:
        options = dict(tier=args.tier, threshold=args.threshold, precision=args.precision,
                       rules=KeeperRules.from_settings(store.settings), include_unverified=args.include_unverified)
        if args.apply:
            result = apply_quarantine(store, args.to, **options)
        else:
            plan = plan_quarantine(store, to=args.to, **options).to_dict()
    if not args.apply:
        if args.json:
            print_json({"applied": False, **plan})
        else:
            _print_plan(plan)
        return 0
    if args.json:
        print_json({"applied": True, **result})
        return 0
    for path, counts in result["settled"].items():
        print(f"settled the interrupted run {path}: {counts['completed']} move(s) completed, "
              f"{counts['abandoned']} not started (left in place)")
    print(f"moved {result['moved']} file(s), {human_bytes(result['bytes_moved'])}, into {result['to']}")
    for item in result["skipped_files"]:
        print(f"  left alone  {item['path']}  ({item['reason']})")
    print(f"manifest: {result['manifest']}")
    print(f"undo: nearsight restore {result['manifest']} --apply")
    return 0


def _print_plan(plan: dict) -> None:
    print("dry run: nothing is moved (add --apply to move the files listed)")
    for g in plan["groups"]:
        print(f"\ngroup {g['gid']}  {g['tier']}  keeper {g['keeper']['path']}  (it {g['keeper']['reason']})")
        for m in g["moves"]:
            of = "" if m["copy_of"]["id"] == g["keeper"]["id"] else f" of {m['copy_of']['path']}, which stays"
            print(f"  move  {human_bytes(m['size']):>9}  {m['path']}  ->  {m['dest']}  ({m['evidence']}{of})")
        for k in g["kept"] + g["unverified"]:
            print(f"  stay  {k['path']}  ({k['reason']})")
        for k in g["skipped"]:
            print(f"  skip  {k['path']}  ({k['reason']})")
    s = plan["summary"]
    print(f"\nwould move {s['files']} file(s) from {s['groups']} group(s) into {plan['to']}, "
          f"freeing {human_bytes(s['bytes_freed'])} ({s['bytes_freed']} bytes)")
    if s["unverified"]:
        print(f"{s['unverified']} near-duplicate(s) stay: geometric verification did not confirm them "
              "(review them, or add --include-unverified to move them anyway)")
    if s["similar_groups_ignored"]:
        print(f"{s['similar_groups_ignored']} group(s) of the similar tier have nothing to move")


RESTORE_WORDS = {"would-restore": "would restore", "restored": "restored", "in-place": "already in place",
                 "refused": "refused", "changed": "changed", "missing": "missing"}


def cmd_restore(args) -> int:
    from .acting.restore import restore, store_of_manifest

    if args.store is None and not os.environ.get(ENV_STORE):
        args.store = store_of_manifest(args.manifest)  # the manifest names the store it was written for
        print(f"nearsight restore: the store the manifest names: {args.store}", file=sys.stderr)
    with open_store(args) as store:
        report = restore(store, args.manifest, apply=args.apply)
    if args.json:
        print_json(report)
    else:
        if not report["applied"]:
            print("dry run: nothing is moved (add --apply to put the files back)")
        for f in report["files"]:
            note = f"  ({f['note']})" if f["note"] else ""
            print(f"  {RESTORE_WORDS[f['outcome']]:<16}  {f['path']}{note}")
        print(", ".join(f"{RESTORE_WORDS[k]} {n}" for k, n in report["counts"].items()) or "nothing to restore")
    return 1 if report["problems"] else 0


def cmd_backup(args) -> int:
    from .backup import backup_store

    with open_store(args) as store:
        report = backup_store(store, args.dest, small_copies=args.small_copies, copy=args.copy)
    if args.json:
        print_json(report)
        return 0
    print(f"backed up {report['store']} into {report['backup']}: generation {report['generation'] or 'none'}, "
          f"{len(report['models'])} model(s), {report['small_copies']} small copies; "
          f"{report['linked']} files hard-linked, {report['copied']} copied ({human_bytes(report['bytes_copied'])}), "
          f"catalog {human_bytes(report['catalog_bytes'])}, in {report['seconds']:.1f} s")
    return 0


def cmd_verify(args) -> int:
    from .integrity import repair_store, verify_store

    with open_store(args) as store:
        findings = verify_store(store)
        repaired: list[str] = []
        if args.repair and any(f.problem and f.repair for f in findings):
            repaired = repair_store(store, findings)
            findings = verify_store(store)
    for line in repaired:
        print(json.dumps({"repaired": line}) if args.json else f"repaired  {line}")
    for f in findings:
        print(json.dumps(f.to_dict(), sort_keys=True) if args.json else f.line())
    problems = sum(f.problem for f in findings)
    if not args.json:
        print(f"{problems} problem(s), {len(findings) - problems} note(s)" if findings else "the store is whole")
    return 1 if problems else 0


# -- demo, settings -----------------------------------------------------------------------------
def cmd_demo(args) -> int:
    from .demo import run_demo

    report = run_demo(Path(args.out), seed=args.seed, originals=args.originals, progress=_progress(args),
                      train_minutes=args.train_minutes, train_epochs=args.train_epochs)
    if args.json:
        print_json(report)
    else:
        for line in report["lines"]:
            print(line)
    return 0


def cmd_settings(args) -> int:
    settings = load_settings(store_dir=resolve_store_path(args.store), config_file=args.config)
    rows = [dict(row, value=settings[row["name"]], source=settings.source(row["name"])) for row in describe_settings()]
    for row in rows:
        if row.pop("secret"):
            row["value"] = "(set)" if row["value"] else "(not set)"
    if args.json:
        print_json([{k: (list(v) if isinstance(v, tuple) else v) for k, v in r.items()} for r in rows])
        return 0
    for row in rows:
        value = ",".join(row["value"]) if isinstance(row["value"], tuple) else row["value"]
        print(f"{row['name']} = {value}   [{row['source']}; env {row['env']}]")
        print(f"    {row['help']}")
    return 0
