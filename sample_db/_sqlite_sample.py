"""What the sample generators share: writing one table into a new SQLite file without
ever leaving a half-written file behind, and their small command line.

Imported by ``depots.py`` and ``plans.py`` from their own folder.
"""

from __future__ import annotations

import argparse
import os
import sqlite3
import sys
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path


def write_table(out: Path, schema: str, table: str, columns: Sequence[str], rows: Iterable[Sequence],
                index_sql: str) -> None:
    """Write ``rows`` into a new SQLite file at ``out``, atomically.

    The table goes into ``<stem>.partial<suffix>`` in one transaction, which then
    replaces ``out`` (and any journal files of an old ``out``) by a rename; on any
    error the partial file is removed and ``out`` is left as it was.
    """
    out.parent.mkdir(parents=True, exist_ok=True)
    partial = out.with_name(out.stem + ".partial" + (out.suffix or ".sqlite"))
    for leftover in (partial, Path(f"{partial}-journal")):
        leftover.unlink(missing_ok=True)
    try:
        con = sqlite3.connect(partial, isolation_level=None)
        try:
            con.execute("BEGIN")
            con.execute(schema)
            con.executemany(
                f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({', '.join('?' * len(columns))})",
                rows,
            )
            con.execute(index_sql)
            con.execute("COMMIT")
        finally:
            con.close()
        for suffix in ("-wal", "-shm", "-journal"):
            Path(f"{out}{suffix}").unlink(missing_ok=True)
        os.replace(partial, out)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise


def run_cli(argv: Sequence[str] | None, *, prog: str, description: str, example_seed: int,
            default_out: Path, default_seed: int, build: Callable[..., Path], table: str, noun: str) -> int:
    """The generators' command line: ``--out`` and ``--seed``; returns the exit code (0 ok, 2 bad arguments)."""
    parser = argparse.ArgumentParser(
        prog=prog,
        description=description,
        epilog=f"example: python sample_db/{prog} --out sample_db/{default_out.name} --seed {example_seed}",
    )
    parser.add_argument("--out", default=str(default_out), help="SQLite file to write (default: %(default)s)")
    parser.add_argument("--seed", type=int, default=default_seed, help="random seed (default: %(default)s)")
    args = parser.parse_args(argv)
    try:
        out = build(args.out, seed=args.seed)
    except ValueError as exc:
        print(f"Error: {exc}", file=sys.stderr)
        return 2
    con = sqlite3.connect(out)
    try:
        (count,) = con.execute(f"SELECT COUNT(*) FROM {table}").fetchone()
    finally:
        con.close()
    print(f"wrote {count} {noun} to {out}")
    return 0
