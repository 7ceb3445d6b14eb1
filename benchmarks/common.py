"""What every benchmark report states about the machine it ran on."""

from __future__ import annotations

import os
import platform
from importlib import metadata

DEFAULT_LIBRARIES = ("numpy", "scipy", "torch", "torchvision", "faiss-cpu", "pillow", "scikit-learn")


def cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown CPU"


def library_versions(names=DEFAULT_LIBRARIES) -> dict[str, str]:
    out = {}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return out


def machine(names=DEFAULT_LIBRARIES) -> str:
    """One line: CPU, cores, OS, Python, library versions and the load average now."""
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    libs = ", ".join(f"{k} {v}" for k, v in library_versions(names).items())
    return (f"{cpu_model()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}, "
            f"Python {platform.python_version()}; {libs}; load average {load:.2f}")


def write_report(out, lines: list[str]) -> int:
    """Write a Markdown report and print it; the exit code of a benchmark's main (0)."""
    from pathlib import Path

    Path(out).write_text("\n".join(lines), encoding="utf-8")
    print("\n".join(lines))
    return 0
