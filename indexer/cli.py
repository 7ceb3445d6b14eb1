"""The `nearsight` command: parses arguments and hands over to indexer's functions.

Errors are turned into one line and an exit code here and nowhere else:
0 success, 1 failure, 2 usage error, 3 store busy (another run holds the lock).
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path
from typing import Callable, Sequence

from . import __version__
from .errors import NearsightError, NotReadyError
from .settings import describe as describe_settings
from .settings import load_settings
from .store import Store, resolve_store_path

log = logging.getLogger("nearsight")


# -- output helpers ------------------------------------------------------------------
def _print_json(obj) -> None:
    print(json.dumps(obj, sort_keys=True))


def _human_bytes(n: int) -> str:
    size = float(n)
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if size < 1024 or unit == "TB":
            return f"{size:.0f} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1024
    return f"{n} B"


def _print_table(rows: Sequence[tuple[str, object]]) -> None:
    width = max(len(k) for k, _ in rows)
    for key, value in rows:
        print(f"  {key:<{width}}  {value}")


def _open_store(args, *, create: bool = False) -> Store:
    root = resolve_store_path(args.store)
    overrides = {name: getattr(args, name, None) for name in ("workers",)}
    settings = load_settings(store_dir=root, config_file=args.config, overrides=overrides)
    return Store.open(root, create=create, settings=settings)


# -- commands --------------------------------------------------------------------------
def cmd_index(args) -> int:
    from .pipeline import run_index

    with _open_store(args, create=True) as store:
        summary = run_index(store, args.folders, progress=False if args.no_progress else None)
    if args.json:
        _print_json(summary)
        return 0
    print(f"indexed {len(args.folders)} folder(s) into {resolve_store_path(args.store)}")
    _print_table([(k, summary[k]) for k in ("new", "changed", "unchanged", "unreadable", "removed", "ignored", "same_bytes")])
    if summary["unreadable_reasons"]:
        reasons = ", ".join(f"{code} {n}" for code, n in summary["unreadable_reasons"].items())
        print(f"  unreadable files by reason: {reasons} (`nearsight status --unreadable` lists them)")
    return 0


def cmd_status(args) -> int:
    from .pipeline import store_status

    with _open_store(args) as store:
        status = store_status(store)
        unreadable = store.catalog.unreadable_files(limit=None if args.unreadable else 0)
    if args.json:
        if args.unreadable:
            status["unreadable_files"] = unreadable
        _print_json(status)
        return 0
    print(f"store {status['store']} (catalog schema {status['schema_version']})")
    _print_table(
        [
            ("source folders", status["sources"]),
            ("image files", status["files"]),
            ("readable", status["ok"]),
            ("unreadable", status["unreadable"]),
            ("removed since seen", status["removed"]),
            ("distinct contents", status["distinct_contents"]),
            ("same-bytes groups", status["same_bytes_groups"]),
            ("bytes (readable)", _human_bytes(status["bytes"])),
        ]
    )
    for root in status["source_folders"]:
        print(f"  source: {root}")
    if args.unreadable:
        for row in unreadable:
            print(f"  unreadable  {Path(row['root']) / row['relpath']}  ({row['reason']})")
    return 0


def cmd_demo(args) -> int:
    from .demo import run_demo

    report = run_demo(Path(args.out), seed=args.seed, originals=args.originals, progress=False if args.no_progress else None)
    if args.json:
        _print_json(report)
    else:
        for line in report["lines"]:
            print(line)
    return 0


def cmd_settings(args) -> int:
    settings = load_settings(store_dir=resolve_store_path(args.store), config_file=args.config)
    rows = [dict(row, value=settings[row["name"]], source=settings.source(row["name"])) for row in describe_settings()]
    if args.json:
        _print_json([{k: (list(v) if isinstance(v, tuple) else v) for k, v in r.items()} for r in rows])
        return 0
    for row in rows:
        value = ",".join(row["value"]) if isinstance(row["value"], tuple) else row["value"]
        print(f"{row['name']} = {value}   [{row['source']}; env {row['env']}]")
        print(f"    {row['help']}")
    return 0


def _not_yet(issue: str) -> Callable[[argparse.Namespace], int]:
    def command(args) -> int:
        raise NotReadyError(f"`nearsight {args.command}` is not available in this version yet ({issue})")

    return command


# -- parser ----------------------------------------------------------------------------
def _common_options(*, suppress: bool) -> argparse.ArgumentParser:
    """Options accepted before and after the command name.

    The copy given to each command suppresses its defaults so that
    `nearsight --store S status` is not undone by the command's own default.
    """
    opts = argparse.ArgumentParser(add_help=False)
    default = (lambda value: argparse.SUPPRESS) if suppress else (lambda value: value)
    opts.add_argument("--store", default=default(None),
                      help="store directory (default: $NEARSIGHT_STORE, else ./nearsight-store)")
    opts.add_argument("--config", type=Path, default=default(None),
                      help="settings file (default: STORE/settings.toml)")
    opts.add_argument("--debug", action="store_true", default=default(False), help="show tracebacks and debug logging")
    opts.add_argument("-q", "--quiet", action="store_true", default=default(False), help="log warnings and errors only")
    return opts


def build_parser() -> argparse.ArgumentParser:
    top, common = _common_options(suppress=False), _common_options(suppress=True)

    parser = argparse.ArgumentParser(
        prog="nearsight",
        description="Find near-duplicate and similar images in large unlabeled collections.",
        parents=[top],
    )
    parser.add_argument("--version", action="version", version=f"nearsight {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser("index", parents=[common], help="scan folders into the store and build the index",
                       description="Register each FOLDER with the store and scan it recursively: new, changed, "
                                   "unchanged and unreadable files are recorded in the catalog.")
    p.add_argument("folders", nargs="+", metavar="FOLDER", help="folder of images (scanned recursively)")
    p.add_argument("--json", action="store_true", help="print the run summary as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.add_argument("--workers", type=int, help="worker processes (default: setting `workers`)")
    p.set_defaults(func=cmd_index)

    p = sub.add_parser("status", parents=[common], help="counts and state of the store",
                       description="Show what the store holds: files by state, sources, distinct contents.")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.add_argument("--unreadable", action="store_true", help="list every unreadable file with its reason")
    p.set_defaults(func=cmd_status)

    p = sub.add_parser("demo", parents=[common], help="generate the demo archive and run the main job on it",
                       description="Generate the invented Quillon Ford Historical Society archive into a folder, "
                                   "run the main job on it and compare what was found with the planted truth.")
    p.add_argument("--out", default="nearsight-demo", help="folder for the archive and its store (default: ./nearsight-demo)")
    p.add_argument("--seed", type=int, default=7, help="generator seed (default: 7)")
    p.add_argument("--originals", type=int, default=160, help="number of original photos (default: 160)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("settings", parents=[common], help="list every setting, its value and where it came from")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_settings)

    for name, text, issue in (
        ("train", "train the image encoder on a folder", "issue 3"),
        ("similar", "find images similar to given images", "issue 4"),
        ("groups", "list duplicate groups", "issue 4"),
        ("calibrate", "calibrate the duplicate threshold", "issue 5"),
        ("serve", "serve the HTTP API and review page", "issue 6"),
    ):
        p = sub.add_parser(name, parents=[common], help=f"{text} (not yet available)")
        p.set_defaults(func=_not_yet(issue))
    return parser


def _setup_logging(args) -> None:
    level = logging.DEBUG if args.debug else logging.WARNING if args.quiet else logging.INFO
    logging.basicConfig(level=level, format="nearsight: %(message)s", stream=sys.stderr)


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args)
    try:
        return args.func(args)
    except NearsightError as exc:
        if args.debug:
            log.exception("failed")
        print(f"nearsight {args.command}: error: {exc.message}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"nearsight {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
