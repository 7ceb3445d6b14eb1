"""Run `nearsight` in a fresh Python process and report which heavy libraries it imported."""

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def run_fresh(args: list[str], watch: tuple[str, ...] = ("torch", "faiss")) -> dict:
    """`nearsight ARGS` in a new interpreter: its exit code, its standard output, and which of the `watch`
    modules ended up in its own sys.modules (the check of what a command imports)."""
    code = ("import contextlib, io, json, sys\n"
            "from nearsight.indexer.cli import main\n"
            f"sys.argv = ['nearsight'] + {[str(a) for a in args]!r}\n"
            "out = io.StringIO()\n"
            "with contextlib.redirect_stdout(out):\n"
            "    code = main()\n"
            f"print(json.dumps({{'code': code, 'stdout': out.getvalue(), "
            f"'loaded': [m for m in {tuple(watch)!r} if m in sys.modules]}}))\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=ROOT)
    try:
        return json.loads(proc.stdout.strip().splitlines()[-1])
    except (IndexError, ValueError):
        raise AssertionError(f"nearsight {' '.join(map(str, args))} printed no report:\n{proc.stderr}") from None
