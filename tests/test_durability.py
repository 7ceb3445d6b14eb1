"""Durable writes, shown from the system calls: a real `nearsight index`, `quarantine --apply` and
`verdicts import`, each traced with strace (Debian package strace), and the trace checked for the
order POSIX needs for a write to survive a power cut (fsync(2), rename(2) and link(2) as POSIX.1-2017
and the Linux man pages describe them; the "fsync the file, rename, fsync the directory" sequence is
common practice, from memory of the ext4 and SQLite documentation):

- every file renamed into a published name of the store was fsynced after its last write and before the
  rename, and the folder it was renamed into was fsynced after the rename; a folder renamed into place
  (a generation, a model) had every file written in it fsynced, and itself fsynced, before the rename;
- a quarantine's journal record (the manifest line) is fsynced before the source file is unlinked, and
  the file's new folder is fsynced between its link and that unlink;
- the catalog's commits reach the disk before the command reports them: every write to the SQLite
  write-ahead log before the command's last line of output is followed by an fsync of the log before that
  line (SQLite runs with synchronous=FULL under WAL: indexer/storage/catalog.py).

Caches (thumbnails, small copies) are written without fsync on purpose: a torn one is read as broken and
made again. They are left out of the check, and so are files outside the store and the archive.

Marked slow (a traced index takes about a minute); skipped with the reason when strace cannot attach.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
STRACE = shutil.which("strace")
CACHES = ("thumbs", "small")  # store folders written without fsync by design
SYSCALLS = "write,pwrite64,writev,fsync,fdatasync,rename,renameat,renameat2,link,linkat,unlink,unlinkat,exit_group"

pytestmark = pytest.mark.slow


@dataclass
class Call:
    pid: int
    name: str
    paths: tuple[str, ...]  # file arguments (fds resolved by strace -y), in order
    ok: bool
    fd: int | None = None  # the file descriptor of a call on one


_LINE = re.compile(r"^(\d+)\s+(\w+)\((.*)\)\s+=\s+(-?\d+|\?)")
_FD = re.compile(r"(?:AT_FDCWD|\d+)<([^>]*)>")
_DIRFD_NAME = re.compile(r"(?:AT_FDCWD|\d+)<([^>]*)>,\s*\"([^\"]*)\"")
_NAME = re.compile(r"\"([^\"]*)\"")


def parse(trace: str) -> list[Call]:
    """The completed calls of an `strace -f -y -s 0` log, in order of completion (an interrupted call,
    "<unfinished ...>", is joined to its "<... resumed>" line)."""
    pending: dict[str, str] = {}
    calls = []
    for raw in trace.splitlines():
        pid, _, rest = raw.partition(" ")
        rest = rest.strip()
        if rest.endswith("<unfinished ...>"):
            pending[pid] = rest[: -len("<unfinished ...>")]
            continue
        resumed = re.match(r"<\.\.\. \w+ resumed>(.*)", rest)
        if resumed:
            rest = pending.pop(pid, "") + resumed.group(1)
        match = _LINE.match(f"{pid} {rest}")
        if not match:
            continue
        _, name, args, ret = match.groups()
        if name in ("rename", "link"):
            paths = tuple(_NAME.findall(args))
        elif name in ("renameat", "renameat2", "linkat", "unlinkat"):
            paths = tuple(n if n.startswith("/") else os.path.join(d, n) for d, n in _DIRFD_NAME.findall(args))
        elif name == "unlink":
            paths = tuple(_NAME.findall(args))
        else:
            paths = tuple(_FD.findall(args))[:1]
        fd = re.match(r"(\d+)<", args)
        calls.append(Call(int(pid), name, paths, ret != "?" and int(ret) >= 0, int(fd.group(1)) if fd else None))
    return calls


def _under(path: str, folder: Path) -> bool:
    return path == str(folder) or path.startswith(str(folder) + "/")


def _last(calls, before: int, names: tuple[str, ...], path: str) -> int:
    return max((i for i in range(before) if calls[i].ok and calls[i].name in names and calls[i].paths
                and calls[i].paths[0] == path), default=-1)


def rename_problems(calls: list[Call], store: Path) -> list[str]:
    """Renames into the store's published names that could be lost or torn by a power cut."""
    writes, syncs = ("write", "pwrite64", "writev"), ("fsync", "fdatasync")
    problems = []
    for i, call in enumerate(calls):
        if call.name not in ("rename", "renameat", "renameat2") or not call.ok or len(call.paths) != 2:
            continue
        src, dst = call.paths
        if not _under(dst, store) or any(_under(dst, store / c) for c in CACHES):
            continue
        written_inside = {c.paths[0] for c in calls[:i] if c.name in writes and c.ok and c.paths
                          and _under(c.paths[0], Path(src)) and c.paths[0] != src}
        for path in sorted(written_inside | ({src} if _last(calls, i, writes, src) >= 0 else set())):
            if _last(calls, i, syncs, path) < _last(calls, i, writes, path):
                problems.append(f"{path} renamed to {dst} without an fsync after its last write")
        if written_inside and _last(calls, i, syncs, src) < 0:
            problems.append(f"folder {src} renamed to {dst} before it was fsynced")
        parent = os.path.dirname(dst)
        if not any(c.name in syncs and c.ok and c.paths and c.paths[0] == parent for c in calls[i + 1:]):
            problems.append(f"{parent} not fsynced after {src} was renamed into it")
    return problems


def wal_problems(calls: list[Call], store: Path) -> list[str]:
    """A commit the command reports (its last line on standard output or error) must be on disk by then:
    every write to the write-ahead log before that report is followed by an fsync of the log before it."""
    wal = str(store / "catalog.sqlite-wal")
    report = max((i for i, c in enumerate(calls) if c.name in ("write", "writev") and c.fd in (1, 2) and c.ok),
                 default=len(calls))
    last_write = _last(calls, report, ("write", "pwrite64", "writev"), wal)
    if last_write < 0:
        return [f"no write to {wal} traced before the command's report"]
    if _last(calls, report, ("fsync", "fdatasync"), wal) < last_write:
        return ["the catalog's last commit before the command's report was not fsynced"]
    return []


def _traced(store: Path, trace: Path, *args) -> str:
    cmd = [STRACE, "-f", "-y", "-s", "0", "-qq", "-o", str(trace), "-e", f"trace={SYSCALLS}",
           sys.executable, "-m", "nearsight", *map(str, args), "--store", str(store)]
    proc = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, timeout=900)
    if proc.returncode != 0 and "ptrace" in proc.stderr.lower():
        pytest.skip(f"strace cannot attach here: {proc.stderr.strip()[:200]}")
    assert proc.returncode == 0, proc.stderr[-3000:]
    return trace.read_text(errors="replace")


@pytest.fixture(scope="module")
def traced_index(tmp_path_factory):
    if STRACE is None:
        pytest.skip("strace is not installed (Debian package strace; scripts/system-deps.sh installs it)")
    from .test_train import skimage_photos

    work = tmp_path_factory.mktemp("durable")
    archive = work / "archive"
    (archive / "copies").mkdir(parents=True)
    for name, im in list(skimage_photos())[:10]:
        im.thumbnail((256, 256))
        im.save(archive / f"{name}.jpg", quality=90)
        im.save(archive / f"{name}-same-pixels.png")
        # Byte-identical copies: grouped by their hash whatever the few seconds of training learned, so the
        # quarantine below always has files to move.
        shutil.copy2(archive / f"{name}.jpg", archive / "copies" / f"{name}.jpg")
    store = work / "store"
    text = _traced(store, work / "index.trace", "index", archive, "--no-progress", "--train-minutes", "0.05",
                   "--no-calibrate")
    return work, archive, store, parse(text)


def test_the_parser_reads_what_strace_writes():
    """Lines as strace 6 prints them with -f -y: an interrupted fsync joined to its resumption."""
    text = ('101 write(3</s/.a.tmp>, ""..., 10) = 10\n'
            '101 fsync(3</s/.a.tmp> <unfinished ...>\n'
            '102 write(4</s/x>, ""..., 5) = 5\n'
            '101 <... fsync resumed>) = 0\n'
            '101 renameat2(AT_FDCWD</w>, "/s/.a.tmp", AT_FDCWD</w>, "/s/a", RENAME_NOREPLACE) = 0\n'
            '101 fsync(5</s>) = 0\n')
    calls = parse(text)
    assert [(c.name, c.paths) for c in calls] == [("write", ("/s/.a.tmp",)), ("write", ("/s/x",)),
                                                  ("fsync", ("/s/.a.tmp",)), ("renameat2", ("/s/.a.tmp", "/s/a")),
                                                  ("fsync", ("/s",))]
    assert rename_problems(calls, Path("/s")) == []
    assert rename_problems(calls[:2] + calls[3:], Path("/s")) == [
        "/s/.a.tmp renamed to /s/a without an fsync after its last write"]
    assert rename_problems(calls[:-1], Path("/s")) == ["/s not fsynced after /s/.a.tmp was renamed into it"]


def test_index_fsyncs_every_published_file_before_its_rename_and_its_folder_after(traced_index):
    _, _, store, calls = traced_index
    renames = [c for c in calls if c.name.startswith("rename") and c.ok and len(c.paths) == 2
               and _under(c.paths[1], store / "generations")]
    assert renames  # a generation was published
    assert rename_problems(calls, store) == []
    assert wal_problems(calls, store) == []


def _traced_on_a_copy(store: Path, tmp_path: Path, *args) -> tuple[Path, list[Call]]:
    """`args` traced on a copy of the indexed store (each test acts on its own)."""
    copy = tmp_path / "store"
    shutil.copytree(store, copy, symlinks=True)
    return copy, parse(_traced(copy, tmp_path / "command.trace", *args))


def test_quarantine_journals_each_move_before_the_source_goes(traced_index, tmp_path):
    _, archive, store, _ = traced_index
    copy, calls = _traced_on_a_copy(store, tmp_path, "quarantine", "--to", tmp_path / "quarantine", "--apply", "--json")
    unlinks = [i for i, c in enumerate(calls) if c.name in ("unlink", "unlinkat") and c.ok and c.paths
               and _under(c.paths[0], archive)]
    assert unlinks  # the byte-identical copies moved
    manifest = next(c.paths[0] for c in calls if c.name == "write" and c.paths and "manifest-" in c.paths[0])
    for i in unlinks:
        source = calls[i].paths[0]
        assert _last(calls, i, ("fsync", "fdatasync"), manifest) > _last(calls, i, ("write",), manifest), source
        linked = max(j for j in range(i) if calls[j].name in ("link", "linkat") and calls[j].paths[0] == source)
        new_folder = os.path.dirname(calls[linked].paths[1])
        assert _last(calls, i, ("fsync", "fdatasync"), new_folder) > linked, source
    assert rename_problems(calls, copy) == []
    assert wal_problems(calls, copy) == []


def test_a_verdict_import_is_on_disk_when_the_command_ends(traced_index, tmp_path):
    _, archive, store, _ = traced_index
    verdicts = tmp_path / "verdicts.csv"
    verdicts.write_text(f"a,b,verdict\n{archive / 'astronaut.jpg'},{archive / 'coffee.jpg'},different\n")
    copy, calls = _traced_on_a_copy(store, tmp_path, "verdicts", "import", verdicts)
    assert any(c.name == "write" and c.fd in (1, 2) for c in calls)  # the command said what it stored
    assert wal_problems(calls, copy) == []
