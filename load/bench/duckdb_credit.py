#!/usr/bin/env python3
"""last_touch and linear credit as DuckDB SQL, the reference of load/bench.sh.

usage: python3 load/bench/duckdb_credit.py INPUT.ndjson OUTPUT.ndjson [--threads N]

Reads an NDJSON input of the contract (docs/contract.md, "Input events") and
writes one credit row per eligible touch and model (last_touch, linear), or
one `unattributed` row per model, as NDJSON. It follows the contract's
"Journey rules" with the default durations:

- duplicates: a repeated event_id is dropped, the first line kept. The
  service forgets ids after dedupe_horizon (7 days of event time); this SQL
  drops every repeat. Inputs of `apportion-load gen` repeat a line right
  away, so both agree on them.
- path order: per user, (event time, input line).
- a conversion at T credits the open touches with T - 30d <= t <= T (views
  too: view_lookback defaults to lookback); then every open touch before it
  in path order leaves the journey, so the next conversion sees only later
  touches. An erase also empties the journey (and credits nothing).
- expiry (30d) is not modelled: with expiry = lookback a touch it removes is
  older than any conversion's lookback window, so it never changes credit.
- invalid events (reject reasons) are not checked; gen writes none.

Rows carry the raw user id in no field (the pseudonym is a bijection, so the
comparison is per conversion and per channel). Only the work from reading the
input to writing the output is in this process, so timing the whole process
(/usr/bin/time -v) is fair to both sides.
"""
import argparse
import sys

import duckdb

LOOKBACK_MS = 30 * 86_400_000


def main(argv):
    ap = argparse.ArgumentParser(description="last_touch and linear credit as DuckDB SQL")
    ap.add_argument("input")
    ap.add_argument("output")
    ap.add_argument("--threads", type=int, help="DuckDB worker threads (default: DuckDB's, one per core)")
    a = ap.parse_args(argv)
    src, out, threads = a.input, a.output, a.threads
    con = duckdb.connect()
    if threads:
        con.execute(f"SET threads = {threads}")
    con.execute("SET preserve_insertion_order = true")
    # Arrival order: a table keeps its insertion order in rowid.
    con.execute(
        """
        CREATE TABLE raw AS
        SELECT * FROM read_json(?, format = 'newline_delimited', columns = {
            type: 'VARCHAR', event_id: 'VARCHAR', user_id: 'VARCHAR', timestamp: 'VARCHAR',
            channel: 'VARCHAR', campaign: 'VARCHAR', interaction: 'VARCHAR',
            goal: 'VARCHAR', value: 'DOUBLE', currency: 'VARCHAR'})
        """,
        [src],
    )
    con.execute(
        f"""
        CREATE TABLE ev AS
        WITH numbered AS (
            SELECT rowid AS line, *,
                   CASE WHEN regexp_full_match(timestamp, '-?[0-9]+') THEN CAST(timestamp AS BIGINT)
                        ELSE epoch_ms(CAST(timestamp AS TIMESTAMPTZ)) END AS ts
            FROM raw
        ),
        dedup AS (
            SELECT * FROM numbered
            QUALIFY event_id IS NULL OR row_number() OVER (PARTITION BY event_id ORDER BY line) = 1
        )
        SELECT *,
               -- how many conversions/erases come before this event in path order:
               -- touches with k belong to the journey the (k+1)-th boundary closes
               coalesce(sum(CASE WHEN type <> 'touch' THEN 1 ELSE 0 END) OVER (
                   PARTITION BY user_id ORDER BY ts, line
                   ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0) AS k
        FROM dedup
        """
    )
    con.execute(
        f"""
        CREATE TABLE elig AS
        SELECT c.event_id AS conversion_id, c.goal, c.value, c.currency, c.ts AS conv_ts,
               t.event_id AS touch_event_id, t.channel, t.campaign,
               coalesce(t.interaction, 'click') AS interaction, t.ts AS touch_ts,
               row_number() OVER (PARTITION BY c.event_id ORDER BY t.ts, t.line) AS position,
               count(*) OVER (PARTITION BY c.event_id) AS path_length
        FROM ev c JOIN ev t
          ON t.user_id = c.user_id AND t.k = c.k AND t.type = 'touch'
         AND t.ts >= c.ts - {LOOKBACK_MS} AND t.ts <= c.ts
         AND (t.ts < c.ts OR t.line < c.line)
        WHERE c.type = 'conversion'
        """
    )
    con.execute(
        f"""
        COPY (
            SELECT conversion_id, m.model, coalesce(goal, 'conversion') AS goal, touch_event_id, channel,
                   campaign, interaction, position, path_length, credit,
                   CASE WHEN value IS NULL THEN NULL ELSE credit * value END AS credited_value, currency
            FROM (
                SELECT e.*, m.model,
                       CASE m.model WHEN 'last_touch' THEN CASE WHEN position = path_length THEN 1.0 ELSE 0.0 END
                                    ELSE 1.0 / path_length END AS credit
                FROM elig e, (VALUES ('last_touch'), ('linear')) m(model)
                UNION ALL
                SELECT c.event_id, c.goal, c.value, c.currency, c.ts, NULL, 'unattributed', NULL, NULL, NULL,
                       0, 0, m.model, 1.0
                FROM ev c, (VALUES ('last_touch'), ('linear')) m(model)
                WHERE c.type = 'conversion'
                  AND NOT EXISTS (SELECT 1 FROM elig e WHERE e.conversion_id = c.event_id)
            ) m
        ) TO '{out.replace("'", "''")}' (FORMAT JSON)
        """
    )
    rows = con.execute("SELECT count(*) FROM elig").fetchone()[0]
    convs = con.execute("SELECT count(*) FROM ev WHERE type = 'conversion'").fetchone()[0]
    print(f"duckdb: {convs} conversions, {rows} eligible touches, {2 * rows} credit rows (+ unattributed)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
