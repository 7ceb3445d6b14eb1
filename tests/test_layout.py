"""The architecture as the import statements show it: data flows one way through the stages.

`nearsight.indexer` is split into sub-packages named for the stages of the data flow (their order is
given in indexer/__init__.py). A module may import from its own stage and from earlier ones, never
from a later one; the command layer (the modules left at the top of indexer/) may import any stage,
and no stage imports it; the service and the Python API sit above the stages, which never import
them (the command layer does: `nearsight serve` starts the service). Read from the source with the standard library's `ast`, including imports inside functions, so
that a lazy import cannot hide a dependency that points backwards.
"""

import ast
from pathlib import Path

import pytest

from nearsight import indexer

ROOT = Path(__file__).resolve().parent.parent
INDEXER = ROOT / "indexer"


def _module_name(path: Path) -> str:
    """The dotted name under nearsight.indexer of a file in indexer/."""
    parts = list(path.relative_to(INDEXER).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(["nearsight", "indexer", *parts])


def _package_of(path: Path) -> str:
    """The package a file's relative imports start from."""
    name = _module_name(path)
    return name if path.name == "__init__.py" else name.rsplit(".", 1)[0]


def _imports(source: str, package: str) -> list[tuple[int, str]]:
    """(line, absolute module name) of every import in the source, relative ones resolved against
    `package`. `from package import module` and `from module import name` both give the dotted
    name with the imported name last, so a module's stage is read from its third part either way."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            found += [(node.lineno, f"{target}.{alias.name}") for alias in node.names]
    return found


def _stage_of(module: str) -> str | None:
    """The stage a nearsight.indexer module belongs to, or None for the command layer."""
    parts = module.split(".")
    if parts[:2] != ["nearsight", "indexer"] or len(parts) < 3:
        return None
    return parts[2] if parts[2] in indexer.STAGES else None


SOURCES = sorted(p for p in INDEXER.rglob("*.py") if "__pycache__" not in p.parts)


def test_the_stages_are_the_sub_packages_in_data_flow_order():
    folders = {p.name for p in INDEXER.iterdir() if (p / "__init__.py").is_file()}
    assert folders == set(indexer.STAGES)
    for stage in indexer.STAGES:
        doc = ast.get_docstring(ast.parse((INDEXER / stage / "__init__.py").read_text(encoding="utf-8")))
        assert doc and len(doc.split()) >= 20, f"{stage}/__init__.py says what it owns"


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: p.relative_to(INDEXER).as_posix())
def test_imports_flow_one_way(path):
    here = _stage_of(_module_name(path))
    rank = {stage: i for i, stage in enumerate(indexer.STAGES)}
    wrong = []
    for line, target in _imports(path.read_text(encoding="utf-8"), _package_of(path)):
        if here is None:
            continue  # the command layer: `nearsight serve` starts the service, so it may import anything
        if target.startswith(("nearsight.service", "nearsight.api")):
            wrong.append(f"line {line}: {target} (a stage imports a layer above the indexer)")
            continue
        if not target.startswith("nearsight.indexer."):
            continue
        there = _stage_of(target)
        if there is None:
            # The command layer, or the package's own __version__.
            if target != "nearsight.indexer.__version__":
                wrong.append(f"line {line}: {target} (a stage imports the command layer)")
        elif rank[there] > rank[here]:
            wrong.append(f"line {line}: {target} ({here} imports the later stage {there})")
    assert not wrong, "\n".join(wrong)


def test_the_checker_sees_a_backward_import():
    """The rule above is not vacuous: a lazy import from a later stage, written the way the code
    base writes its imports, is resolved to that stage."""
    source = "def f():\n    from ..building.pipeline import run_index\n    return run_index\n"
    imports = _imports(source, "nearsight.indexer.reading")
    assert imports == [(2, "nearsight.indexer.building.pipeline.run_index")]
    assert indexer.STAGES.index(_stage_of(imports[0][1])) > indexer.STAGES.index("reading")
