#!/usr/bin/env python3
"""Compare the credit of `apportion replay` with the DuckDB reference.

usage: python3 load/bench/compare_totals.py REPLAY.ndjson DUCKDB.ndjson [MODELS]

MODELS (comma-separated, default last_touch,linear) are compared; other
models in REPLAY.ndjson are ignored. Per (model, channel): row count, sum of
credit and sum of credited_value must agree to 1e-6 relative (1e-9 absolute
near zero). Also reported, and required to be 0: rows (conversion, model,
touch) present on one side only or with a credit differing by more than
1e-9. Prints the table and exits 1 on any disagreement.
"""
import sys

import duckdb

REL = 1e-6


def main(argv):
    if len(argv) < 2:
        print(__doc__.strip().splitlines()[2], file=sys.stderr)
        return 2
    replay, ref = argv[0], argv[1]
    models = (argv[2] if len(argv) > 2 else "last_touch,linear").split(",")
    con = duckdb.connect()
    cols = """{conversion_id: 'VARCHAR', model: 'VARCHAR', touch_event_id: 'VARCHAR', channel: 'VARCHAR',
               credit: 'DOUBLE', credited_value: 'DOUBLE'}"""
    for name, path in (("a", replay), ("b", ref)):
        con.execute(
            f"CREATE TABLE {name} AS SELECT * FROM read_json(?, format = 'newline_delimited', columns = {cols}) "
            "WHERE list_contains(?, model)",
            [path, models],
        )
    totals = con.execute(
        """
        WITH ta AS (SELECT model, channel, count(*) n, sum(credit) c, sum(credited_value) v FROM a GROUP BY ALL),
             tb AS (SELECT model, channel, count(*) n, sum(credit) c, sum(credited_value) v FROM b GROUP BY ALL)
        SELECT coalesce(ta.model, tb.model) AS model, coalesce(ta.channel, tb.channel) AS channel,
               ta.n, tb.n, ta.c, tb.c, ta.v, tb.v
        FROM ta FULL JOIN tb ON ta.model = tb.model AND ta.channel = tb.channel
        ORDER BY 1, 2
        """
    ).fetchall()
    bad = 0
    if not totals:
        print("totals check: FAILED (no credit rows of these models on either side)")
        return 1

    def close(x, y):
        if x is None or y is None:
            return x is None and y is None
        return abs(x - y) <= max(REL * max(abs(x), abs(y)), 1e-9)

    print("model\tchannel\trows_replay\trows_duckdb\tcredit_replay\tcredit_duckdb\tvalue_replay\tvalue_duckdb\tok")
    for m, ch, na, nb, ca, cb, va, vb in totals:
        ok = na == nb and close(ca, cb) and close(va, vb)
        bad += not ok
        print(f"{m}\t{ch}\t{na}\t{nb}\t{ca}\t{cb}\t{va}\t{vb}\t{'ok' if ok else 'DIFFERS'}")
    rows = con.execute(
        """
        SELECT count(*) FROM a FULL JOIN b
          ON a.conversion_id = b.conversion_id AND a.model = b.model
         AND a.touch_event_id IS NOT DISTINCT FROM b.touch_event_id
        WHERE a.model IS NULL OR b.model IS NULL OR abs(a.credit - b.credit) > 1e-9
        """
    ).fetchone()[0]
    print(f"rows differing (conversion, model, touch): {rows}")
    if bad or rows:
        print(f"totals check: FAILED ({bad} (model, channel) totals differ, {rows} rows differ)")
        return 1
    print(f"totals check: ok ({len(totals)} (model, channel) totals agree to {REL} relative)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
