#!/usr/bin/env python3
"""Appends NDJSON lines to a file at a fixed rate, for the latency part of
load/bench.sh (serve follows the file, embedded mode).

usage: fixed_rate.py --rate N --seconds S INPUT OUTPUT

Every tick (10 ms) the lines due by then (rate x elapsed time) are taken from
INPUT in order and appended to OUTPUT in one write, each with its
"timestamp" replaced by the wall-clock time of that tick (UTC, RFC 3339 with
milliseconds). Event time then follows processing time as in a live feed,
so the service's watermark (largest event time seen minus
allowed_lateness) passes a conversion about allowed_lateness after it was
appended: the wait the latency target includes. Order, ids, users and
channels of the input are kept; only the time axis is compressed (a
generated input spans months), so journeys neither expire nor leave the
lookback during a run.

Stops after S seconds or when INPUT runs out (then "exhausted" is true),
and prints one line of JSON: lines written, conversions among them,
seconds from the start to the last write, the achieved rate, and the
latest a tick started after its due time (a late tick catches up, so the
rate holds; a producer that cannot keep up shows in the rate).
Standard library only.
"""

import argparse
import itertools
import json
import os
import re
import sys
import time

TICK = 0.01
STAMP = re.compile(rb'"timestamp":"[^"]*"')


def stamp(t):
    ms = int(t * 1000)
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(ms // 1000)).encode() + b".%03dZ" % (ms % 1000)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rate", type=float, required=True, help="lines per second")
    ap.add_argument("--seconds", type=float, required=True, help="how long to write")
    ap.add_argument("input")
    ap.add_argument("output")
    a = ap.parse_args()
    if a.rate <= 0 or a.seconds <= 0:
        sys.exit("fixed_rate.py: --rate and --seconds must be > 0")

    written = 0
    conversions = 0
    late = 0.0
    exhausted = False
    with open(a.input, "rb") as src:
        fd = os.open(a.output, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        try:
            start = time.monotonic()
            last = None
            tick = 0
            while True:
                elapsed = time.monotonic() - start
                if elapsed >= a.seconds:
                    break
                # Lines due by now; a late tick catches up in one write.
                want = int(a.rate * elapsed) + 1 - written
                if want > 0:
                    chunk = list(itertools.islice(src, want))
                    if chunk and not chunk[-1].endswith(b"\n"):
                        chunk[-1] += b"\n"
                    if chunk:
                        body = b"".join(chunk)
                        conversions += body.count(b'"type":"conversion"')
                        body = STAMP.sub(b'"timestamp":"' + stamp(time.time()) + b'"', body)
                        os.write(fd, body)
                        written += len(chunk)
                        last = time.monotonic()
                    if len(chunk) < want:
                        exhausted = True
                        break
                tick += 1
                pause = start + tick * TICK - time.monotonic()
                if pause > 0:
                    time.sleep(pause)
                else:
                    late = max(late, -pause)
        finally:
            os.close(fd)
    span = (last - start) if last is not None else 0.0
    print(json.dumps({
        "lines": written,
        "conversions": conversions,
        "seconds": round(span, 3),
        "rate": round(written / span, 1) if span > 0 else 0,
        "target_rate": a.rate,
        "exhausted": exhausted,
        "max_late_tick_s": round(late, 4),
    }))


if __name__ == "__main__":
    main()
