"""What `pip install nearsight` puts into site-packages: one import name, `nearsight`.

The wheel is built by pip itself (`pip wheel`, offline: `--no-index --no-build-isolation`, with the
setuptools installed here) from a copy of the source tree, and read with the standard library's zipfile,
as the wheel format (PEP 427) defines it: every entry outside `*.dist-info/` lands in site-packages.
"""

import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
SOURCES = ("pyproject.toml", "README.md", "nearsight", "indexer", "service", "demo_data")


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> zipfile.ZipFile:
    tree = tmp_path_factory.mktemp("source")
    for name in SOURCES:
        src = ROOT / name
        if src.is_dir():
            shutil.copytree(src, tree / name, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        else:
            shutil.copy2(src, tree / name)
    out = tmp_path_factory.mktemp("wheel")
    proc = subprocess.run([sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "--no-index",
                           "--no-build-isolation", "--wheel-dir", str(out), str(tree)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    (built,) = out.glob("nearsight-*.whl")
    with zipfile.ZipFile(built) as zf:
        yield zf


def test_the_wheel_puts_one_import_name_into_site_packages(wheel):
    top = {name.split("/", 1)[0] for name in wheel.namelist()}
    assert {t for t in top if not t.endswith(".dist-info")} == {"nearsight"}
    names = set(wheel.namelist())
    for module in ("nearsight/__init__.py", "nearsight/__main__.py", "nearsight/indexer/cli.py",
                   "nearsight/service/app.py", "nearsight/demo_data/generate.py"):
        assert module in names, module


def test_the_wheel_carries_the_schema_and_the_review_pages_files(wheel):
    names = set(wheel.namelist())
    for data in ("nearsight/indexer/storage/schema.sql", "nearsight/service/templates/review.html",
                 "nearsight/service/static/review.js", "nearsight/service/static/review.css"):
        assert data in names, data


def test_the_command_is_the_packages_entry_point(wheel):
    (entry_points,) = [n for n in wheel.namelist() if n.endswith(".dist-info/entry_points.txt")]
    text = wheel.read(entry_points).decode()
    assert "nearsight = nearsight.indexer.cli:main" in text



def test_every_module_of_the_source_tree_is_in_the_wheel(wheel):
    """The stages' sub-packages are listed one by one in pyproject.toml (setuptools maps folders to
    package names there); one left out would install a nearsight that fails on first import."""
    names = set(wheel.namelist())
    for folder, package in (("indexer", "nearsight/indexer"), ("service", "nearsight/service")):
        for source in (ROOT / folder).rglob("*.py"):
            if "__pycache__" in source.parts:
                continue
            inside = source.relative_to(ROOT / folder).as_posix()
            assert f"{package}/{inside}" in names, inside
