#!/usr/bin/env python3
"""Checks the warehouse DDL and example queries on real engines.

    python3 deploy/warehouse/check_warehouse.py [--duckdb] [--postgres]

With no flag, runs both. For each engine it:
  1. runs the DDL (duckdb.sql or postgres.sql) in a fresh database,
  2. checks the credit table's columns (names and order) against the credit
     output contract (docs/contract.md, "Credit rows") and their types and
     nullability against the types chosen for the warehouse, and that every
     column has a comment,
  3. loads sample_credit.ndjson and sample_paths.ndjson the way the comments
     in the DDL files describe (twice, to show that loading is idempotent),
  4. runs every query in queries.sql and compares the result with values
     worked out by hand from the sample data (see EXPECTED below),
  5. adds one bad row and checks that the data-check query reports it.

PostgreSQL: uses the server named by the usual PG* environment variables if
PGHOST is set; otherwise it starts a throwaway server (initdb in a temporary
directory, Unix socket only, no TCP port) and stops it afterwards. Needs the
PostgreSQL server binaries (Debian package `postgresql`) and psql.
DuckDB: needs the `duckdb` Python package.

The sample data is invented (the example trail shop, an online outdoor-gear shop).
Its credit_id and user_key values were computed with the service's formulas
(SHA-256 of conversion_id/model/position; HMAC-SHA256 with the development key).
"""

from __future__ import annotations

import argparse
import glob
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
TOL = 1e-9

# The credit output contract, in order (docs/contract.md, "Credit rows").
CONTRACT_FIELDS = [
    "credit_id", "conversion_id", "user_key", "model", "model_version", "goal",
    "touch_event_id", "channel", "campaign", "interaction", "position",
    "path_length", "touch_timestamp", "conversion_timestamp", "credit",
    "credited_value", "currency",
]
# Warehouse type of each contract field, and whether it may be null (the
# contract's "string or null" / "number or null" / "RFC 3339 or null" fields,
# plus campaign and interaction, which are null for the unattributed row).
CREDIT_TYPES = {
    "credit_id": ("text", False), "conversion_id": ("text", False),
    "user_key": ("text", False), "model": ("text", False),
    "model_version": ("text", True), "goal": ("text", False),
    "touch_event_id": ("text", True), "channel": ("text", False),
    "campaign": ("text", True), "interaction": ("text", True),
    "position": ("integer", False), "path_length": ("integer", False),
    "touch_timestamp": ("timestamptz", True),
    "conversion_timestamp": ("timestamptz", False),
    "credit": ("double", False), "credited_value": ("double", True),
    "currency": ("text", True),
}
PATHS_TYPES = {
    "path_id": ("text", False), "user_key": ("text", False),
    "converted": ("boolean", False), "conversion_id": ("text", True),
    "goal": ("text", True), "channels": ("text[]", False),
    "touch_count": ("integer", False),
    "first_touch_timestamp": ("timestamptz", False),
    "last_touch_timestamp": ("timestamptz", False),
}
TYPE_NAMES = {
    "text": "text", "varchar": "text", "character varying": "text",
    "integer": "integer", "int4": "integer",
    "double precision": "double", "double": "double", "float8": "double",
    "timestamp with time zone": "timestamptz", "timestamptz": "timestamptz",
    "boolean": "boolean", "bool": "boolean",
    "array": "text[]", "varchar[]": "text[]", "text[]": "text[]",
}

# Expected results, worked out by hand from the sample data:
#   conv-1001 2026-05-10 purchase 120 USD, path email, paid_search, social:
#       last_touch 0, 0, 1; linear 1/3 each; markov 0.5, 0.3, 0.2
#   conv-1002 2026-05-20 signup (no value), path paid_search: 1 under each model
#   conv-1003 2026-05-25 purchase 80 USD, no eligible touch: unattributed, 1
#   conv-0990 2026-04-28 purchase 50 USD, path email (outside May 2026)
#   non-converting paths: [display, display], [email, social]
EXPECTED = {
    # model, channel, conversions, credited_value (USD), conversions_touched
    "credit_by_channel_and_model": [
        ("last_touch", "paid_search", 1.0, 0.0, 2),        # 0 (1001) + 1 (1002); 1002 has no value
        ("last_touch", "social", 1.0, 120.0, 1),
        ("last_touch", "unattributed", 1.0, 80.0, 1),
        ("last_touch", "email", 0.0, 0.0, 1),              # a 0 row is still a row
        ("linear", "paid_search", 4 / 3, 40.0, 2),          # 1/3 + 1; 120/3
        ("linear", "unattributed", 1.0, 80.0, 1),
        ("linear", "email", 1 / 3, 40.0, 1),
        ("linear", "social", 1 / 3, 40.0, 1),
        ("markov", "paid_search", 1.3, 36.0, 2),           # 0.3 + 1; 0.3 * 120
        ("markov", "unattributed", 1.0, 80.0, 1),
        ("markov", "email", 0.5, 60.0, 1),
        ("markov", "social", 0.2, 24.0, 1),
    ],
    # channel, last_touch, markov, difference, relative change
    "model_difference_by_channel": [
        ("email", 0.0, 0.5, 0.5, None),
        ("paid_search", 1.0, 1.3, 0.3, 0.3),
        ("unattributed", 1.0, 1.0, 0.0, 0.0),
        ("social", 1.0, 0.2, -0.8, -0.8),
    ],
    "credit_not_summing_to_one": [],
    # channel, converting paths, non-converting paths (distinct paths)
    "paths_by_channel": [
        ("display", 0, 1),
        ("email", 2, 1),
        ("paid_search", 2, 0),
        ("social", 1, 1),
    ],
}
# After adding one extra linear row of 0.5 to conv-1002.
EXPECTED_AFTER_BAD_ROW = [("conv-1002", "linear", 2, 1.5)]
BAD_ROW = (
    "INSERT INTO credit VALUES ('extra-row', 'conv-1002', 'ab', 'linear', NULL, 'signup', "
    "'t-0004', 'paid_search', NULL, 'click', 1, 1, TIMESTAMPTZ '2026-05-19 20:00:00+00', "
    "TIMESTAMPTZ '2026-05-20 08:30:00+00', 0.5, NULL, NULL)"
)


class CheckError(Exception):
    pass


def queries() -> list[tuple[str, str]]:
    text = (HERE / "queries.sql").read_text()
    parts = text.split("-- name: ")[1:]
    out = []
    for part in parts:
        name, sql = part.split("\n", 1)
        out.append((name.strip(), sql.strip().rstrip(";")))
    names = [n for n, _ in out]
    if sorted(names) != sorted(EXPECTED):
        raise CheckError(f"queries.sql has queries {names}, the checker expects {sorted(EXPECTED)}")
    return out


def same(got, want) -> bool:
    if want is None or got is None:
        return want is None and got is None
    if isinstance(want, float) or isinstance(got, float):
        return abs(float(got) - float(want)) <= TOL
    return str(got) == str(want)


def compare(engine: str, name: str, got: list[tuple], want: list[tuple]) -> None:
    ok = len(got) == len(want) and all(
        len(g) == len(w) and all(same(a, b) for a, b in zip(g, w)) for g, w in zip(got, want)
    )
    if not ok:
        raise CheckError(f"{engine}: query {name}: got\n  {got}\nwanted\n  {want}")
    print(f"  ok   {engine}: {name} ({len(got)} rows)")


def check_columns(engine: str, table: str, got: list[tuple[str, str, bool]], want: dict) -> None:
    names = [g[0] for g in got]
    if table == "credit" and names != CONTRACT_FIELDS:
        raise CheckError(f"{engine}: credit columns {names} differ from the contract {CONTRACT_FIELDS}")
    if sorted(names) != sorted(want):
        raise CheckError(f"{engine}: {table} columns {names}, wanted {list(want)}")
    for name, typ, nullable in got:
        norm = TYPE_NAMES.get(typ.lower())
        if (norm, nullable) != want[name]:
            raise CheckError(f"{engine}: {table}.{name} is {typ} nullable={nullable}, wanted {want[name]}")
    print(f"  ok   {engine}: {table} columns, types and nullability")


def check_contract() -> None:
    """Re-read the credit row fields from the project's contract,
    docs/contract.md ("Credit rows"), the source of CONTRACT_FIELDS."""
    path = HERE.parents[1] / "docs" / "contract.md"
    text = path.read_text()
    m = re.search(r"## Credit rows.*?\n\|[^\n]*\n\|[-| ]+\n((?:\|[^\n]*\n)+)", text, re.S)
    if not m:
        raise CheckError(f"cannot find the Credit rows table in {path}")
    fields = re.findall(r"^\| `([a-z_]+)` \|", m.group(1), re.M)
    if fields != CONTRACT_FIELDS:
        raise CheckError(f"{path} lists credit fields {fields}; the checker has {CONTRACT_FIELDS}")
    print("  ok   contract fields match docs/contract.md")


# ------------------------------------------------------------------ DuckDB

def run_duckdb() -> None:
    try:
        import duckdb  # noqa: PLC0415
    except ImportError as e:
        raise CheckError("the duckdb Python package is missing (pip install duckdb)") from e
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute((HERE / "duckdb.sql").read_text())
    for table, want in (("credit", CREDIT_TYPES), ("paths", PATHS_TYPES)):
        cols = con.execute(
            "SELECT column_name, data_type, is_nullable = 'YES' FROM information_schema.columns "
            "WHERE table_name = ? ORDER BY ordinal_position", [table]).fetchall()
        check_columns("duckdb", table, cols, want)
        missing = con.execute(
            "SELECT column_name FROM duckdb_columns() WHERE table_name = ? AND (comment IS NULL OR comment = '')",
            [table]).fetchall()
        if missing:
            raise CheckError(f"duckdb: {table} columns without a comment: {missing}")
    print("  ok   duckdb: every column has a comment")

    # The load statement documented at the end of duckdb.sql.
    m = re.search(r"--   (INSERT OR IGNORE INTO credit BY NAME.*?;)\n", (HERE / "duckdb.sql").read_text(), re.S)
    if not m:
        raise CheckError("duckdb.sql: the documented load statement is missing")
    load = re.sub(r"\n--\s*", " ", m.group(1)).replace("'credit.ndjson'", "?")
    load = load.rstrip(";")
    for _ in range(2):
        con.execute(load, [str(HERE / "sample_credit.ndjson")])
        con.execute(
            "INSERT OR IGNORE INTO paths BY NAME SELECT * FROM read_json(?, format = 'newline_delimited', "
            "columns = {path_id: 'VARCHAR', user_key: 'VARCHAR', converted: 'BOOLEAN', conversion_id: 'VARCHAR', "
            "goal: 'VARCHAR', channels: 'VARCHAR[]', touch_count: 'INTEGER', "
            "first_touch_timestamp: 'TIMESTAMPTZ', last_touch_timestamp: 'TIMESTAMPTZ'})",
            [str(HERE / "sample_paths.ndjson")])
    counts = con.execute("SELECT (SELECT count(*) FROM credit), (SELECT count(*) FROM paths)").fetchone()
    if counts != (18, 5):
        raise CheckError(f"duckdb: loaded {counts} (credit, paths) rows, wanted (18, 5)")
    print("  ok   duckdb: sample loaded twice, 18 credit and 5 path rows (idempotent)")

    for name, sql in queries():
        compare("duckdb", name, [tuple(r) for r in con.execute(sql).fetchall()], EXPECTED[name])
    con.execute(BAD_ROW)
    sql = dict(queries())["credit_not_summing_to_one"]
    compare("duckdb", "credit_not_summing_to_one after a bad row",
            [tuple(r) for r in con.execute(sql).fetchall()], EXPECTED_AFTER_BAD_ROW)


# -------------------------------------------------------------- PostgreSQL

def pg_bindir() -> Path:
    cands = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"),
                   key=lambda p: int(re.search(r"/(\d+)/bin", p).group(1)))
    if cands:
        return Path(cands[-1]).parent
    if shutil.which("initdb"):
        return Path(shutil.which("initdb")).parent
    raise CheckError("PostgreSQL server binaries (initdb) not found: apt-get install -y postgresql")


class TempPostgres:
    """A throwaway PostgreSQL server listening only on a Unix socket in a
    temporary directory. The postmaster runs as a direct child of this
    process (no pg_ctl daemonizing), so it is stopped and reaped here."""

    def __init__(self) -> None:
        self.bindir = pg_bindir()
        self.dir = Path(tempfile.mkdtemp(prefix="apportion-pg-"))
        self.data = self.dir / "data"
        # initdb and postgres refuse to run as root.
        self.user = {"user": "postgres", "group": "postgres"} if os.geteuid() == 0 else {}
        self.proc: subprocess.Popen | None = None

    def __enter__(self) -> dict:
        if self.user:
            shutil.chown(self.dir, "postgres", "postgres")
        r = subprocess.run([str(self.bindir / "initdb"), "-D", str(self.data), "-U", "postgres",
                            "--auth=trust", "--no-sync", "-E", "UTF8", "--locale=C"],
                           capture_output=True, text=True, **self.user)
        if r.returncode != 0:
            raise CheckError(f"initdb failed:\n{r.stdout}{r.stderr}")
        self.log = open(self.dir / "server.log", "w")
        self.proc = subprocess.Popen(
            [str(self.bindir / "postgres"), "-D", str(self.data), "-k", str(self.dir), "-p", "5432",
             "-c", "listen_addresses=", "-c", "fsync=off"],
            stdout=self.log, stderr=subprocess.STDOUT, **self.user)
        env = {"PGHOST": str(self.dir), "PGPORT": "5432", "PGUSER": "postgres", "PGDATABASE": "postgres"}
        for _ in range(120):
            if self.proc.poll() is not None:
                raise CheckError(f"postgres exited at startup:\n{(self.dir / 'server.log').read_text()}")
            ready = subprocess.run([str(self.bindir / "pg_isready"), "-q"], env={**os.environ, **env})
            if ready.returncode == 0:
                return env
            time.sleep(0.5)
        raise CheckError("postgres did not become ready within 60 s")

    def __exit__(self, *exc) -> None:
        try:
            if self.proc is not None and self.proc.poll() is None:
                self.proc.send_signal(signal.SIGINT)  # fast shutdown
                try:
                    self.proc.wait(timeout=60)
                except subprocess.TimeoutExpired:
                    self.proc.kill()
                    self.proc.wait()
        finally:
            if getattr(self, "log", None):
                self.log.close()
            shutil.rmtree(self.dir, ignore_errors=True)


def psql(env: dict, sql: str | None = None, file: Path | None = None) -> list[tuple]:
    cmd = ["psql", "-X", "-q", "-v", "ON_ERROR_STOP=1", "-At", "-F", "\x1f", "-P", "null=<NULL>"]
    if file:
        cmd += ["-f", str(file)]
    r = subprocess.run(cmd, input=sql, capture_output=True, text=True, env={**os.environ, **env})
    if r.returncode != 0:
        raise CheckError(f"psql failed: {r.stderr.strip()}\n--- SQL ---\n{sql or file}")
    rows = []
    for line in r.stdout.splitlines():
        if line:
            rows.append(tuple(None if v == "<NULL>" else v for v in line.split("\x1f")))
    return rows


def typed(rows: list[tuple], want: list[tuple]) -> list[tuple]:
    """psql prints text: convert each value to the type of the expected value."""
    out = []
    for r, w in zip(rows, want + [None] * len(rows)):
        vals = []
        for i, v in enumerate(r):
            kind = type(w[i]) if w is not None and w[i] is not None else str
            if v is not None and kind in (int, float):
                v = kind(float(v)) if kind is int else float(v)
            vals.append(v)
        out.append(tuple(vals))
    return out


def run_postgres_on(env: dict) -> None:
    psql(env, "DROP SCHEMA IF EXISTS apportion_check CASCADE; CREATE SCHEMA apportion_check;")
    env = {**env, "PGOPTIONS": "-c search_path=apportion_check -c TimeZone=UTC"}
    try:
        psql(env, file=HERE / "postgres.sql")
        for table, want in (("credit", CREDIT_TYPES), ("paths", PATHS_TYPES)):
            cols = psql(env, f"SELECT column_name, data_type, is_nullable FROM information_schema.columns "
                             f"WHERE table_schema = 'apportion_check' AND table_name = '{table}' "
                             f"ORDER BY ordinal_position")
            check_columns("postgres", table, [(n, t, nl == "YES") for n, t, nl in cols], want)
            missing = psql(env, f"SELECT a.attname FROM pg_attribute a "
                                f"WHERE a.attrelid = 'apportion_check.{table}'::regclass AND a.attnum > 0 "
                                f"AND NOT a.attisdropped AND col_description(a.attrelid, a.attnum) IS NULL")
            if missing:
                raise CheckError(f"postgres: {table} columns without a comment: {missing}")
        print("  ok   postgres: every column has a comment")

        # The load statements documented at the end of postgres.sql, with the
        # CSV variant that is safe for backslashes.
        for _ in range(2):
            for table, sample in (("credit", "sample_credit.ndjson"), ("paths", "sample_paths.ndjson")):
                key = "credit_id" if table == "credit" else "path_id"
                psql(env, f"""
CREATE TEMP TABLE staging (doc jsonb);
\\copy staging (doc) FROM '{HERE / sample}' WITH (FORMAT csv, QUOTE E'\\x01', DELIMITER E'\\x02')
INSERT INTO {table}
SELECT r.* FROM staging s, jsonb_populate_record(NULL::{table}, s.doc) AS r
ON CONFLICT ({key}) DO NOTHING;
""")
        counts = psql(env, "SELECT (SELECT count(*) FROM credit), (SELECT count(*) FROM paths)")
        if counts != [("18", "5")]:
            raise CheckError(f"postgres: loaded {counts} (credit, paths) rows, wanted 18 and 5")
        print("  ok   postgres: sample loaded twice, 18 credit and 5 path rows (idempotent)")

        for name, sql in queries():
            compare("postgres", name, typed(psql(env, sql + ";"), EXPECTED[name]), EXPECTED[name])
        psql(env, BAD_ROW + ";")
        sql = dict(queries())["credit_not_summing_to_one"]
        compare("postgres", "credit_not_summing_to_one after a bad row",
                typed(psql(env, sql + ";"), EXPECTED_AFTER_BAD_ROW), EXPECTED_AFTER_BAD_ROW)
    finally:
        psql({k: v for k, v in env.items() if k != "PGOPTIONS"}, "DROP SCHEMA IF EXISTS apportion_check CASCADE;")


def run_postgres() -> None:
    if not shutil.which("psql"):
        raise CheckError("psql not found: apt-get install -y postgresql-client")
    if os.environ.get("PGHOST"):
        print(f"  info postgres: using the server at PGHOST={os.environ['PGHOST']}")
        run_postgres_on({})
        return
    with TempPostgres() as env:
        print("  info postgres: started a throwaway server on a Unix socket")
        run_postgres_on(env)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--duckdb", action="store_true")
    ap.add_argument("--postgres", action="store_true")
    args = ap.parse_args()
    both = not (args.duckdb or args.postgres)
    try:
        check_contract()
        if args.duckdb or both:
            run_duckdb()
        if args.postgres or both:
            run_postgres()
    except CheckError as e:
        print(f"FAIL warehouse: {e}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
