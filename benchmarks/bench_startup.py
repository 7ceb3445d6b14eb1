"""How long a command takes from a cold process to its answer, as a new user meets it.

Each command runs `--rounds` times as a fresh `python -m nearsight` process against a store (a quality
benchmark's trained store by default), rounds interleaved so that load changes touch every command alike.
Reported: the median wall time of each, its ratio to a bare `python -c pass` measured in the same rounds,
and for a one-image `similar`, where its time goes (`python -X importtime` for the imports, the rest).

Nothing is asserted; the figures are for benchmarks/results/startup.md.

    .venv/bin/python benchmarks/bench_startup.py --store /tmp/nsq/work/stores/train-10min --image Q.jpg \\
        --out benchmarks/results/startup.md
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import machine  # noqa: E402

LIBRARIES = ("numpy", "torch", "faiss-cpu", "pillow", "onnxruntime")


def commands(store: str, image: str) -> dict[str, list[str]]:
    nearsight = [sys.executable, "-m", "nearsight"]
    return {
        "python -c pass (the floor)": [sys.executable, "-c", "pass"],
        "nearsight --help": nearsight + ["--help"],
        "nearsight status": nearsight + ["status", "--store", store],
        "nearsight settings": nearsight + ["settings", "--store", store],
        "nearsight groups": nearsight + ["groups", "--store", store],
        "nearsight similar (one image, runtime auto)": nearsight + ["similar", "--store", store, image],
        "nearsight similar (one image, runtime torch)": nearsight + ["similar", "--store", store, image],
    }


def _env(name: str) -> dict[str, str]:
    env = dict(os.environ)
    env["NEARSIGHT_RUNTIME"] = "torch" if "runtime torch" in name else "auto"
    return env


def import_costs(argv: list[str], top: int = 8) -> list[tuple[str, float]]:
    """The slowest top-level imports of one run (cumulative seconds, `python -X importtime`)."""
    proc = subprocess.run([argv[0], "-X", "importtime", *argv[1:]], capture_output=True, text=True,
                          env=_env("auto"))
    costs: dict[str, float] = {}
    for line in proc.stderr.splitlines():
        m = re.match(r"import time:\s+\d+ \|\s+(\d+) \| (\s*)(\S+)", line)
        if m and len(m.group(2)) <= 1:  # top-level imports only (their own children are inside them)
            costs[m.group(3)] = int(m.group(1)) / 1e6
    return sorted(costs.items(), key=lambda kv: -kv[1])[:top]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--store", required=True)
    parser.add_argument("--image", required=True, help="the query of the one-image `similar`")
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--out", type=Path)
    args = parser.parse_args()
    before = machine(LIBRARIES)
    cmds = commands(args.store, args.image)
    times: dict[str, list[float]] = {name: [] for name in cmds}
    for _ in range(args.rounds):
        for name, argv in cmds.items():
            t0 = time.perf_counter()
            proc = subprocess.run(argv, capture_output=True, env=_env(name))
            times[name].append(time.perf_counter() - t0)
            if proc.returncode != 0:
                raise SystemExit(f"{name} failed: {proc.stderr.decode()[-2000:]}")
    floor = statistics.median(times["python -c pass (the floor)"])
    rows = [f"| {name} | {statistics.median(t):.2f} | {min(t):.2f} - {max(t):.2f} | "
            f"{statistics.median(t) / floor:.1f} |" for name, t in times.items()]
    similar = cmds["nearsight similar (one image, runtime auto)"]
    costs = import_costs(similar)
    text = "\n".join([
        "# Start-up: a command from a cold process to its answer",
        "",
        f"Machine: {before}",
        "",
        f"Command: `.venv/bin/python benchmarks/bench_startup.py --store {args.store} --image {args.image}` "
        f"({args.rounds} rounds, every command once a round, interleaved; wall time of the whole process).",
        "",
        "| command | median (s) | range (s) | times `python -c pass` |",
        "|---|---:|---:|---:|",
        *rows,
        "",
        "The slowest top-level imports of the one-image `similar` (runtime auto), cumulative, one run of "
        "`python -X importtime`:",
        "",
        "| module | s |",
        "|---|---:|",
        *[f"| {name} | {seconds:.2f} |" for name, seconds in costs],
        "",
    ])
    if args.out:
        args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
