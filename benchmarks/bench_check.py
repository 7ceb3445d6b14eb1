"""`nearsight check` on new material: what it finds, and what it costs against indexing the same files.

The demo archive (an invented historical society, demo_data/) is generated with enough originals that its
new material (newsletter exports, members' donations, duplicates of scans) is at least 1,000 files. A
store is indexed from the masters and the 1987 scans only, as an archive would be before a donation
arrives. Then, in the same run and from the same starting store:

* `check` on the new material, as a user runs it (`python -m nearsight check ... --json`): its wall time,
  and its verdicts against the planted truth: a checked file is a copy when the truth puts it in one
  duplicate group with a file of the store. Precision of the files called `copy` is set beside the
  precision the query verdict promises;
* `index` of the same folders into a copy of that store with the same encoder (`--retrain never`): its
  wall time with and without calibration. The goal: `check` costs no more than indexing, less the training.

Also that `check` left the store as it was: the SHA-256 of catalog.sqlite and of the CURRENT pointer.

    .venv/bin/python benchmarks/bench_check.py --work /tmp/nscheck --train-minutes 10

Times are ratios measured in one run; the report (default benchmarks/results/check.md) states the machine.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import shutil
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import machine, write_report  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
STORED = ("masters", "scans-1987")
NEW = ("newsletter-exports", "donations", "duplicates-of-scans")


def _nearsight(*args: str) -> tuple[float, subprocess.CompletedProcess]:
    started = time.monotonic()
    proc = subprocess.run([sys.executable, "-m", "nearsight", *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT)
    if proc.returncode not in (0, 1) or "Traceback" in proc.stderr:
        raise SystemExit(f"nearsight {' '.join(map(str, args))} failed:\n{proc.stderr[-3000:]}")
    return time.monotonic() - started, proc


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _store_state(store: Path) -> dict:
    return {"catalog.sqlite": _sha256(store / "catalog.sqlite"),
            **{p.name: _sha256(p) for p in store.iterdir() if p.name.startswith("CURRENT")}}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--work", type=Path, required=True, help="a folder for the archive and the stores")
    ap.add_argument("--originals", type=int, default=900, help="demo originals (900 give over 1,000 new files)")
    ap.add_argument("--train-minutes", type=float, default=10.0)
    ap.add_argument("--out", type=Path, default=ROOT / "benchmarks/results/check.md")
    args = ap.parse_args()

    from nearsight.demo_data._layout import ROOT as ARCHIVE_DIR
    from nearsight.indexer.demo import ensure_archive
    from nearsight.indexer.matching.query_verdict import QueryVerdictConfig

    work = args.work
    work.mkdir(parents=True, exist_ok=True)
    truth = ensure_archive(work / "demo", seed=7, originals=args.originals)
    archive = work / "demo" / ARCHIVE_DIR
    new_files = sorted(p for name in NEW for p in (archive / name).rglob("*") if p.is_file())
    print(f"{len(new_files)} files of new material", flush=True)

    store = work / "store"
    if not (store / "catalog.sqlite").exists():
        t_first, _ = _nearsight("index", *(archive / n for n in STORED), "--store", store, "--no-progress",
                                "--train-minutes", args.train_minutes)
        print(f"store indexed from {', '.join(STORED)} in {t_first:.0f} s", flush=True)
    before = _store_state(store)
    for copy in ("store-index", "store-index-nocal"):
        shutil.rmtree(work / copy, ignore_errors=True)
        shutil.copytree(store, work / copy, symlinks=True)

    t_check, proc = _nearsight("check", *(archive / n for n in NEW), "--store", store, "--json")
    answers = [json.loads(line) for line in proc.stdout.splitlines()]
    after = _store_state(store)
    t_index_nocal, _ = _nearsight("index", *(archive / n for n in (*STORED, *NEW)), "--store", work / "store-index-nocal",
                                  "--no-progress", "--retrain", "never", "--no-calibrate")
    t_index, _ = _nearsight("index", *(archive / n for n in (*STORED, *NEW)), "--store", work / "store-index",
                            "--no-progress", "--retrain", "never")

    base = work / "demo"
    stored_files = {p.relative_to(base).as_posix() for n in STORED for p in (archive / n).rglob("*") if p.is_file()}
    group_of = {path: i for i, group in enumerate(truth["duplicate_groups"]) for path in group}
    stored_groups = {group_of[p] for p in stored_files if p in group_of}
    called = correct = should = 0
    for a in answers:
        rel = Path(a["path"]).resolve().relative_to(base.resolve()).as_posix()
        is_copy = group_of.get(rel) in stored_groups
        should += is_copy
        if a["verdict"] == "copy":
            called += 1
            correct += is_copy
    promise = QueryVerdictConfig().false_flag_rate
    others = len(answers) - should
    lines = [
        "# `check` on new material against indexing it",
        "",
        f"Machine: {machine()}. Command: `.venv/bin/python benchmarks/bench_check.py --work WORK "
        f"--originals {args.originals} --train-minutes {args.train_minutes:g}`.",
        "",
        f"Demo archive (seed 7, {args.originals} originals). The store holds {', '.join(STORED)} "
        f"({len(stored_files)} files); the new material is {', '.join(NEW)}: {len(new_files)} files.",
        "",
        "| step | wall time | share of `index` with calibration |",
        "|---|---:|---:|",
        f"| `check` (start-up included) | {t_check:.1f} s | {t_check / t_index:.2f} |",
        f"| `index --retrain never --no-calibrate` of the same files | {t_index_nocal:.1f} s | {t_index_nocal / t_index:.2f} |",
        f"| `index --retrain never` of the same files | {t_index:.1f} s | 1.00 |",
        "",
        f"`check` against `index` without calibration: **{t_check / t_index_nocal:.2f}x** the time.",
        "",
        "| verdicts of `check` | |",
        "|---|---:|",
        *(f"| {v} | {sum(a['verdict'] == v for a in answers)} |" for v in ("copy", "similar", "new", "unreadable")),
        f"| copies of stored files in the new material (truth) | {should} |",
        f"| called copy, and a copy by the truth | {correct} |",
        f"| precision of `copy` | {correct / max(1, called):.3f} |",
        f"| recall of `copy` | {correct / max(1, should):.3f} |",
        f"| files that are no copy of a stored file (truth) | {others} |",
        f"| of those, called copy (false flags) | {called - correct} ({(called - correct) / max(1, others):.3f}) |",
        f"| the query verdict's promise: false flags per query without its original | at most {promise:.2f} |",
        "",
        f"The store after `check`: catalog.sqlite and the CURRENT pointer "
        f"{'unchanged (SHA-256)' if after == before else 'CHANGED: ' + json.dumps([before, after])}.",
        "",
    ]
    return write_report(args.out, lines)


if __name__ == "__main__":
    sys.exit(main())
