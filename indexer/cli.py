"""The `nearsight` command: parses arguments and hands over to `commands`.

Errors are turned into one line and an exit code here and nowhere else:
0 success, 1 failure, 2 usage error, 3 store busy (another run holds the lock).
"""

from __future__ import annotations

import argparse
import logging
import os
import sqlite3
import sys
from pathlib import Path
from typing import Sequence

from . import __version__, commands
from .core.errors import NearsightError, disk_full
from .core.limits import PRECISION, THRESHOLD, K

log = logging.getLogger("nearsight")


class _Parser(argparse.ArgumentParser):
    """argparse with a usage error in one line and where to read more, instead of the usage block
    first (the block is what `--help` is for)."""

    def error(self, message: str):
        self.exit(2, f"{self.prog}: error: {message}\n(see '{self.prog} --help')\n")


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


def _training_options(p: argparse.ArgumentParser, *, budget_flag: str, budget_dest: str) -> None:
    g = p.add_argument_group("training")
    g.add_argument(budget_flag, dest=budget_dest, type=float, help="training budget in minutes")
    g.add_argument("--epochs", type=float, help="training budget in epochs (instead of minutes)")
    g.add_argument("--arch", help="encoder architecture: resnet_narrow (default), mobilenet_v3_small, tiny")
    g.add_argument("--dim", type=int, help="embedding dimension")
    g.add_argument("--size", type=int, help="input image side in pixels")
    g.add_argument("--batch-size", type=int, help="images per training batch")
    g.add_argument("--temperature", type=float, help="NT-Xent temperature")
    g.add_argument("--queue-len", type=int, help="extra negatives kept from earlier batches (0 = none)")
    g.add_argument("--seed", type=int, help="random seed (repeatable runs)")


def build_parser() -> argparse.ArgumentParser:
    top, common = _common_options(suppress=False), _common_options(suppress=True)
    parser = _Parser(
        prog="nearsight",
        description="Find near-duplicate and similar images in large unlabeled collections.",
        parents=[top],
    )
    parser.add_argument("--version", action="version", version=f"nearsight {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser("index", parents=[common], help="scan folders, train if needed, embed, index and group",
                       description="Register each FOLDER with the store and scan it recursively (new, changed, "
                                   "moved, unchanged, unreadable and removed files are recorded; a moved file keeps "
                                   "its id); train an encoder if the store has none (or by --retrain); embed what is "
                                   "new; update or rebuild the index and the duplicate groups; publish them as a new "
                                   "generation. Run again on the same store, it is the nightly job: its cost follows "
                                   "what changed. Exit code 3: another run holds the store.")
    p.add_argument("folders", nargs="+", metavar="FOLDER", help="folder of images (scanned recursively)")
    p.add_argument("--json", action="store_true", help="print the run summary as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.add_argument("--workers", type=int, help="worker processes (default: setting `workers`)")
    p.add_argument("--scan-only", action="store_true", help="only scan: no training, embedding or index")
    p.add_argument("--index-spec", help="FAISS index_factory string for experts (default: chosen by collection size)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="embed on the Dask cluster whose scheduler is at ADDRESS (e.g. tcp://10.0.0.5:8786); its "
                        "workers must see the store and the source folders at the same paths")
    p.add_argument("--no-calibrate", action="store_true",
                   help="keep the default thresholds instead of calibrating them after the build")
    p.add_argument("--retrain", choices=("auto", "never", "always"), default="auto",
                   help="train a new encoder first: auto (default) when the collection grew by more than the "
                        "setting retrain_growth since the model was trained or its held-out check dropped on new "
                        "images; never; always. The current generation keeps serving until the new one is published")
    _training_options(p, budget_flag="--train-minutes", budget_dest="train_minutes")
    p.set_defaults(func=commands.cmd_index)

    p = sub.add_parser("train", parents=[common], help="train the image encoder on the store's images",
                       description="Train the encoder by contrastive self-supervision on the store's images (after "
                                   "scanning FOLDER if given), or fine-tune it from a person's verdicts.")
    p.add_argument("folders", nargs="*", metavar="FOLDER", help="folders to scan into the store first")
    p.add_argument("--resume", action="store_true", help="continue an interrupted training from its checkpoint")
    source = p.add_mutually_exclusive_group()
    source.add_argument("--from-verdicts", metavar="CSV",
                        help="fine-tune from pairs marked same/different (a verdict file: CSV columns a,b,verdict[,note], a and b image ids or paths)")
    source.add_argument("--from-stored-verdicts", action="store_true",
                        help="fine-tune from the verdicts the store holds (the review page's, `verdicts import`'s)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    _training_options(p, budget_flag="--minutes", budget_dest="minutes")
    p.set_defaults(func=commands.cmd_train)

    p = sub.add_parser("similar", parents=[common], help="find images similar to given images",
                       description="For each PATH (an image, or a folder of images) list its nearest neighbours in "
                                   "the current generation, best first, with the duplicate verdict.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="image file or folder of images")
    p.add_argument("-k", type=K.argparse_type(), default=10, help="neighbours per query (default: 10)")
    p.add_argument("--threshold", type=THRESHOLD.argparse_type(), help="cosine at or above which a result is a duplicate "
                                                   "(default: the generation's threshold)")
    p.add_argument("--precision", type=PRECISION.argparse_type(), help="instead of a threshold: the calibrated one for this precision")
    p.add_argument("--json", action="store_true", help="JSON Lines: one object per query")
    p.set_defaults(func=commands.cmd_similar)

    p = sub.add_parser("check", parents=[common], help="check new material against the archive (adds nothing to it)",
                       description="For each PATH (an image, or a folder of images) say whether it is a copy of a "
                                   "catalogued file, similar to one, new, or unreadable, with its best match. "
                                   "Nothing is added to the store. Files whose bytes the catalog holds are "
                                   "answered by their content hash, without decoding.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="image file or folder of images")
    p.add_argument("--threshold", type=THRESHOLD.argparse_type(),
                   help="similarity from which a match is a copy (default: the generation's query verdict)")
    p.add_argument("--precision", type=PRECISION.argparse_type(), help="instead of a threshold: the calibrated one for this precision")
    form = p.add_mutually_exclusive_group()
    form.add_argument("--json", action="store_true", help="JSON Lines: one object per file")
    form.add_argument("--csv", action="store_true", help="CSV: one row per file")
    form.add_argument("--format", choices=("table", "json", "csv", "html"), default="table",
                      help="table (default), json (as --json), csv (as --csv), or html: a contact sheet with each "
                           "copy beside its match and the common region outlined (written to --out)")
    p.add_argument("--out", help="html: the page to write (default ./nearsight-check.html; its pictures go "
                                 "to a folder beside it)")
    p.add_argument("--fail-on", choices=("copy", "similar"),
                   help="exit with 1 when any file is a copy (copy), or a copy or similar (similar): for pipelines")
    p.set_defaults(func=commands.cmd_check)

    p = sub.add_parser("groups", parents=[common], help="list duplicate groups",
                       description="List the current generation's duplicate groups, or regroup at --threshold, "
                                   "as a person's verdicts leave them: a pair marked different is never in one "
                                   "group, a pair marked same always is.")
    p.add_argument("--threshold", type=THRESHOLD.argparse_type(), help="regroup at this cosine similarity (duplicate groups only, no similar tier)")
    p.add_argument("--precision", type=PRECISION.argparse_type(), help="regroup at the calibrated threshold for this precision")
    p.add_argument("--tier", choices=("same-bytes", "same-pixels", "person-same", "near-duplicate", "similar"),
                   help="only groups of this tier")
    p.add_argument("--format", choices=("table", "json", "csv", "html", "keep-list", "drop-list"), default="table",
                   help="output format; keep-list: one path a line, every readable file the quarantine plan would "
                        "not move; drop-list: CSV of the files it would move, each with the file it duplicates")
    p.add_argument("--out", help="write to this file (html: default STORE/reports/groups-<generation>.html, its "
                                 "pictures in a folder beside it; keep-list and drop-list: a name ending in "
                                 ".parquet writes Apache Parquet, with the optional extra nearsight[parquet])")
    p.set_defaults(func=commands.cmd_groups)

    p = sub.add_parser("calibrate", parents=[common], help="calibrate the duplicate thresholds for a stated precision",
                       description="Measure, for the current model and collection, how precise and complete each "
                                   "threshold is (synthetic copies of held-out images as positives, closest pairs and "
                                   "random pairs as negatives, a person's verdicts when there are enough), choose each "
                                   "tier's threshold for its target precision and publish the generation again with "
                                   "them. Writes calibration.json, calibration.png and calibration.txt beside the index.")
    p.add_argument("--target-precision", type=float, help="near-duplicate tier target (default: setting target_precision)")
    p.add_argument("--similar-target-precision", type=float, help="similar tier target (default: setting similar_target_precision)")
    p.add_argument("--json", action="store_true", help="print the calibration's figures as JSON")
    p.set_defaults(func=commands.cmd_calibrate)

    p = sub.add_parser("verdicts", parents=[common], help="import or count a person's same/different verdicts",
                       description="Verdicts on pairs of images (same / different) act at once on the groups and "
                                   "the quarantine plan (a pair marked different is split, one marked same joined) "
                                   "and sharpen the calibration. "
                                   "`verdicts import FILE.csv` stores those of a CSV file with columns a, b (image ids "
                                   "or paths), verdict and optionally note; `verdicts show` counts them.")
    p.add_argument("action", choices=("import", "show"), help="import a CSV file, or show the counts")
    p.add_argument("file", nargs="?", metavar="FILE.csv", help="the CSV file to import")
    p.add_argument("--author", help="who gave these verdicts (stored with them)")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=commands.cmd_verdicts)

    p = sub.add_parser("quarantine", parents=[common],
                       help="move the copies in duplicate groups into a folder (a dry run unless --apply)",
                       description="Plan, per duplicate group of the current generation, which file stays (the "
                                   "keeper) and which copies move into DIR, and show it with the bytes freed. With "
                                   "--apply, move them: each source gets its own sub-folder of DIR, each move is "
                                   "checked by content hash and journalled in DIR/manifest-*.jsonl before the next "
                                   "one. A file moves only on evidence against the keeper: the same bytes or "
                                   "pixels, a person's 'same', or a near-duplicate match confirmed by geometric "
                                   "verification; similar files never move; nothing is ever deleted. "
                                   "Keeper policy: --keep, then --prefer-folder, then --prefer-format, then most "
                                   "pixels, larger file, oldest, path.")
    p.add_argument("--to", required=True, metavar="DIR", help="quarantine folder, outside every source folder")
    regroup = p.add_mutually_exclusive_group()
    regroup.add_argument("--threshold", type=THRESHOLD.argparse_type(), help="regroup at this cosine similarity first")
    regroup.add_argument("--precision", type=PRECISION.argparse_type(),
                         help="regroup at the calibrated threshold whose estimated precision reaches this")
    p.add_argument("--tier", choices=("same-bytes", "same-pixels", "person-same", "near-duplicate"),
                   help="weakest relation to the keeper that moves (default near-duplicate: all four)")
    p.add_argument("--include-unverified", action="store_true",
                   help="also move near-duplicates that geometric verification did not confirm (a learned match "
                        "alone; by default they stay and the plan lists them)")
    p.add_argument("--keep", action="append", dest="keep_paths", metavar="PATTERN",
                   help="never move files matching this path or glob (repeatable; setting keep_paths)")
    p.add_argument("--prefer-folder", action="append", dest="prefer_folders", metavar="PATTERN",
                   help="keep the copy under this folder pattern, earliest given first (repeatable; "
                        "setting prefer_folders)")
    p.add_argument("--prefer-format", dest="prefer_formats", metavar="FORMATS",
                   help="keep the copy in these formats, earliest first, e.g. png,tiff (setting prefer_formats)")
    p.add_argument("--apply", action="store_true", help="move the files (default: only show the plan)")
    p.add_argument("--json", action="store_true", help="print the plan (and what was done) as JSON")
    p.set_defaults(func=commands.cmd_quarantine)

    p = sub.add_parser("restore", parents=[common], help="put quarantined files back (a dry run unless --apply; "
                       "the store is the one the manifest names unless --store or $NEARSIGHT_STORE says otherwise)",
                       description="Put every file a quarantine manifest moved back at its original path, checked "
                                   "by content hash. A different file now at an original path is never "
                                   "overwritten; the same bytes already there count as restored.")
    p.add_argument("manifest", metavar="MANIFEST", help="a manifest-*.jsonl file from the quarantine folder")
    p.add_argument("--apply", action="store_true", help="move the files back (default: only show what would happen)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.set_defaults(func=commands.cmd_restore)

    p = sub.add_parser("backup", parents=[common], help="a consistent copy of the store, while serve and index run",
                       description="Copy the store into DEST (a new or empty folder outside it): the catalog "
                                   "through SQLite's online backup, the published generations, their models and "
                                   "the small copies hard-linked when DEST is on the same filesystem, else "
                                   "copied. DEST is itself a store: point --store at it to use or restore it.")
    p.add_argument("dest", metavar="DEST", help="the backup folder (new, or empty)")
    p.add_argument("--without-small-copies", dest="small_copies", action="store_false",
                   help="leave out the small copies (derivable again from the source files by `index`)")
    p.add_argument("--copy", action="store_true",
                   help="copy every file even on the same filesystem (a hard link is the same bytes on the same "
                        "disk: a backup against losing that disk must be a copy on another one)")
    p.add_argument("--json", action="store_true", help="print what was copied as JSON")
    p.set_defaults(func=commands.cmd_backup)

    p = sub.add_parser("verify", parents=[common], help="check that the store is whole (--repair: make again what "
                       "is derived)",
                       description="Check the catalog (SQLite's integrity check), every published generation's files "
                                   "against the checksums recorded when it was published, the current index against "
                                   "its items, the vectors it needs, the small copies and the quarantined files. "
                                   "One line per finding; exit 0 when nothing is wrong, 1 otherwise. --repair makes "
                                   "again what is derived (small copies, vectors, the current generation) under the "
                                   "store's lock; it never touches an image and never drops a verdict.")
    p.add_argument("--repair", action="store_true", help="make again what is derived, then check again")
    p.add_argument("--json", action="store_true", help="JSON Lines: one object per finding")
    p.set_defaults(func=commands.cmd_verify)

    p = sub.add_parser("status", parents=[common], help="counts and state of the store",
                       description="Show what the store holds: files by state, sources, model, generation.")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.add_argument("--unreadable", action="store_true", help="list every unreadable file with its reason")
    p.set_defaults(func=commands.cmd_status)

    p = sub.add_parser("demo", parents=[common], help="generate the demo archive and run the main job on it",
                       description="Generate the invented Quillon Ford Historical Society archive into a folder, "
                                   "run the main job on it and compare what was found with the planted truth.")
    p.add_argument("--out", default="nearsight-demo", help="folder for the archive and its store (default: ./nearsight-demo)")
    p.add_argument("--seed", type=int, default=7, help="generator seed (default: 7)")
    p.add_argument("--originals", type=int, default=160, help="number of original photos (default: 160)")
    p.add_argument("--train-minutes", type=float, default=3.0, help="training budget (default: 3)")
    p.add_argument("--train-epochs", type=float,
                   help="training budget in passes over the archive instead of minutes: the same encoder on a "
                        "busy or an idle machine")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.set_defaults(func=commands.cmd_demo)

    p = sub.add_parser("settings", parents=[common], help="list every setting, its value and where it came from")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=commands.cmd_settings)

    p = sub.add_parser("serve", parents=[common], help="serve the HTTP API and the review page",
                       description="Answer similarity and duplicate-group queries over HTTP (JSON under /v1, OpenAPI "
                                   "at /v1/openapi.json) and serve the review page at /, under waitress. A newly "
                                   "published generation is swapped in without a restart.")
    p.add_argument("--host", dest="serve_host", metavar="HOST",
                   help="address to listen on (default: setting serve_host, 127.0.0.1); beyond loopback the "
                        "setting api_key is required")
    p.add_argument("--port", dest="serve_port", type=int, metavar="PORT",
                   help="TCP port (default: setting serve_port, 8080; 0: any free port)")
    p.add_argument("--threads", "--workers", dest="serve_threads", type=int, metavar="N",
                   help="request threads (default: setting serve_threads, 8)")
    p.set_defaults(func=commands.cmd_serve)
    return parser


def _setup_logging(args) -> None:
    level = logging.DEBUG if args.debug else logging.WARNING if args.quiet else logging.INFO
    logging.basicConfig(level=level, format="nearsight: %(message)s", stream=sys.stderr)
    # FAISS logs each optional CPU-specific module it fails to load; not news for a user.
    logging.getLogger("faiss").setLevel(max(level, logging.WARNING))


QUERY_COMMANDS = ("similar", "check", "serve")


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args)
    if args.command in QUERY_COMMANDS:
        # torch and FAISS each bring an OpenMP runtime; when one thread alternates embedding and
        # searching, spinning idle threads of one runtime starve the other (a 13 ms upload search
        # took 30-440 ms in benchmarks/bench_http.py). Must be set before either library loads.
        os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    try:
        try:
            return args.func(args)
        except (OSError, sqlite3.OperationalError) as exc:
            full = disk_full(exc)
            if full is None:
                raise
            raise full from exc
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
