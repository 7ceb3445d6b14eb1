"""Keep and drop lists (indexer/acting/keeplist.py) on a real store of scikit-image's photos and planted copies.

Reference: the quarantine plan as `nearsight quarantine --json` prints it (what would move), and the
catalog's files read with sqlite3 directly: the keep list must be every present readable file less the
plan's moves, and the drop list exactly the moves; the CSV is read back with Python's csv module.
"""

import csv
import io
import json
import sqlite3
from pathlib import Path


def _present_files(store_dir) -> set[str]:
    conn = sqlite3.connect(store_dir / "catalog.sqlite")
    rows = conn.execute("SELECT s.root, f.relpath FROM files f JOIN sources s ON s.id = f.source_id "
                        "JOIN contents c ON c.id = f.content_id WHERE f.state = 'ok' AND c.state = 'ok'").fetchall()
    conn.close()
    return {str(Path(root) / rel) for root, rel in rows}


def test_the_keep_list_is_every_file_less_the_plans_moves_and_the_drop_list_is_the_moves(service_store, run_cli,
                                                                                          tmp_path):
    store = service_store.copy("keeplist")
    plan = json.loads(run_cli("quarantine", "--store", store, "--to", tmp_path / "q", "--json", check_exit=0).stdout)
    moves = {m["path"]: m for g in plan["groups"] for m in g["moves"]}
    assert moves  # the planted copies
    keep = run_cli("groups", "--store", store, "--format", "keep-list", check_exit=0).stdout.splitlines()
    assert keep == sorted(_present_files(store) - set(moves))
    out = tmp_path / "drop.csv"
    run_cli("groups", "--store", store, "--format", "drop-list", "--out", out, check_exit=0)
    rows = list(csv.DictReader(io.StringIO(out.read_text())))
    assert {r["path"] for r in rows} == set(moves)
    for r in rows:
        m = moves[r["path"]]
        assert (r["duplicate_of"], r["tier"], r["evidence"], int(r["bytes"])) == \
            (m["copy_of"]["path"], m["tier"], m["evidence"], m["size"])
    assert not set(keep) & {r["path"] for r in rows}
    assert not (tmp_path / "q").exists()  # lists, not moves
    # The same lists as Apache Parquet, read back with pyarrow: the same rows, the numbers typed.
    import pyarrow.parquet as pq

    run_cli("groups", "--store", store, "--format", "keep-list", "--out", tmp_path / "keep.parquet", check_exit=0)
    assert pq.read_table(tmp_path / "keep.parquet").column("path").to_pylist() == keep
    run_cli("groups", "--store", store, "--format", "drop-list", "--out", tmp_path / "drop.parquet", check_exit=0)
    table = pq.read_table(tmp_path / "drop.parquet")
    assert str(table.schema.field("bytes").type) == "int64"
    assert sorted(table.to_pylist(), key=lambda r: r["path"]) == sorted(
        ({**r, "id": int(r["id"]), "duplicate_of_id": int(r["duplicate_of_id"]), "bytes": int(r["bytes"])}
         for r in rows), key=lambda r: r["path"])
