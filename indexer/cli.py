"""The `nearsight` command: parses arguments and hands over to `commands`.

Errors are turned into one line and an exit code here and nowhere else:
0 success, 1 failure, 2 usage error, 3 store busy (another run holds the lock).
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path
from typing import Callable, Sequence

from . import __version__, commands
from .errors import NearsightError, NotReadyError

log = logging.getLogger("nearsight")


def _not_yet(issue: str) -> Callable[[argparse.Namespace], int]:
    def command(args) -> int:
        raise NotReadyError(f"`nearsight {args.command}` is not available in this version yet ({issue})")

    return command


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
    parser = argparse.ArgumentParser(
        prog="nearsight",
        description="Find near-duplicate and similar images in large unlabeled collections.",
        parents=[top],
    )
    parser.add_argument("--version", action="version", version=f"nearsight {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser("index", parents=[common], help="scan folders, train if needed, embed, index and group",
                       description="Register each FOLDER with the store and scan it recursively (new, changed, "
                                   "unchanged, unreadable and removed files are recorded); train an encoder if the "
                                   "store has none; embed what is new; build the index and the duplicate groups; "
                                   "publish them as a new generation.")
    p.add_argument("folders", nargs="+", metavar="FOLDER", help="folder of images (scanned recursively)")
    p.add_argument("--json", action="store_true", help="print the run summary as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.add_argument("--workers", type=int, help="worker processes (default: setting `workers`)")
    p.add_argument("--scan-only", action="store_true", help="only scan: no training, embedding or index")
    p.add_argument("--index-spec", help="FAISS index_factory string for experts (default: chosen by collection size)")
    _training_options(p, budget_flag="--train-minutes", budget_dest="train_minutes")
    p.set_defaults(func=commands.cmd_index)

    p = sub.add_parser("train", parents=[common], help="train the image encoder on the store's images",
                       description="Train the encoder by contrastive self-supervision on the store's images (after "
                                   "scanning FOLDER if given), or fine-tune it from a person's verdicts.")
    p.add_argument("folders", nargs="*", metavar="FOLDER", help="folders to scan into the store first")
    p.add_argument("--resume", action="store_true", help="continue an interrupted training from its checkpoint")
    p.add_argument("--from-verdicts", metavar="CSV",
                   help="fine-tune from pairs marked same/different (CSV columns path_a,path_b,verdict)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    _training_options(p, budget_flag="--minutes", budget_dest="minutes")
    p.set_defaults(func=commands.cmd_train)

    p = sub.add_parser("similar", parents=[common], help="find images similar to given images",
                       description="For each PATH (an image, or a folder of images) list its nearest neighbours in "
                                   "the current generation, best first, with the duplicate verdict.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="image file or folder of images")
    p.add_argument("-k", type=int, default=10, help="neighbours per query (default: 10)")
    p.add_argument("--threshold", type=float, help="cosine at or above which a result is a duplicate "
                                                   "(default: the generation's threshold)")
    p.add_argument("--json", action="store_true", help="JSON Lines: one object per query")
    p.set_defaults(func=commands.cmd_similar)

    p = sub.add_parser("groups", parents=[common], help="list duplicate groups",
                       description="List the current generation's duplicate groups, or regroup at --threshold.")
    p.add_argument("--threshold", type=float, help="regroup at this cosine similarity (duplicate groups only, no similar tier)")
    p.add_argument("--tier", choices=("same-bytes", "same-pixels", "near-duplicate", "similar"), help="only groups of this tier")
    p.add_argument("--format", choices=("table", "json", "csv", "html"), default="table", help="output format")
    p.add_argument("--out", help="write to this file (html: default STORE/reports/groups-<generation>.html)")
    p.set_defaults(func=commands.cmd_groups)

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
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.set_defaults(func=commands.cmd_demo)

    p = sub.add_parser("settings", parents=[common], help="list every setting, its value and where it came from")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=commands.cmd_settings)

    for name, text, issue in (
        ("calibrate", "calibrate the duplicate threshold", "issue 5"),
        ("serve", "serve the HTTP API and review page", "issue 6"),
    ):
        p = sub.add_parser(name, parents=[common], help=f"{text} (not yet available)")
        p.set_defaults(func=_not_yet(issue))
    return parser


def _setup_logging(args) -> None:
    level = logging.DEBUG if args.debug else logging.WARNING if args.quiet else logging.INFO
    logging.basicConfig(level=level, format="nearsight: %(message)s", stream=sys.stderr)
    # FAISS logs each optional CPU-specific module it fails to load; not news for a user.
    logging.getLogger("faiss").setLevel(max(level, logging.WARNING))


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
