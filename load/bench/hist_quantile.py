#!/usr/bin/env python3
"""Quantiles of a Prometheus histogram between two scrapes of /metrics, for
the latency part of load/bench.sh.

usage: hist_quantile.py [--target SECONDS] [--before METRICS] METRIC AFTER q [q ...]

Takes the cumulative buckets METRIC_bucket{le="..."} (and METRIC_sum) of the
text exposition AFTER, minus those of BEFORE when given (the observations
made between the two scrapes), and prints key=value lines:

  count=N          observations
  mean=S           METRIC_sum / count (exact, not estimated)
  p<100q>=S        estimated quantile, e.g. p50, p99 (see below)
  p<100q>_bucket=(a,b]  the bucket the quantile falls in: the estimate is
                   only known to lie in it
  le_<bound>=F     share of observations <= bound, for the bucket bounds
                   next to --target (exact at bucket bounds)

Formula source: Prometheus docs, histogram_quantile (PromQL functions), as
implemented in Prometheus (promql/quantile.go, bucketQuantile): rank = q x
count; the first bucket whose cumulative count reaches the rank holds the
quantile, which is interpolated linearly between the bucket's lower bound
(the previous bucket's upper bound; 0 for the first bucket when its bound is
positive) and its upper bound, assuming observations spread evenly in the
bucket. If it falls in the +Inf bucket, the largest finite bound is
returned. With no observations the result is NaN. Exactness is limited by
the bucket bounds the service defines (services/serve/src/metrics.rs).
"""

import argparse
import math
import re
import sys

LINE = re.compile(r'^(?P<name>[a-zA-Z_:][a-zA-Z0-9_:]*)(?:\{(?P<labels>[^}]*)\})?\s+(?P<value>\S+)')


def read(path, metric):
    """{le: cumulative count} and the sum of one label-less histogram."""
    buckets, total = {}, 0.0
    if path is None:
        return buckets, total
    with open(path) as f:
        for line in f:
            m = LINE.match(line)
            if not m:
                continue
            if m["name"] == metric + "_bucket":
                le = re.search(r'le="([^"]*)"', m["labels"] or "")
                if le:
                    buckets[float(le.group(1))] = float(m["value"])
            elif m["name"] == metric + "_sum":
                total = float(m["value"])
    return buckets, total


def bucket_quantile(q, buckets):
    """Prometheus' bucketQuantile over sorted (upper bound, cumulative count)."""
    if not buckets or math.isnan(q):
        return math.nan, None
    if q < 0:
        return -math.inf, None
    if q > 1:
        return math.inf, None
    if buckets[-1][0] != math.inf:
        return math.nan, None
    count = buckets[-1][1]
    if count == 0:
        return math.nan, None
    rank = q * count
    b = next(i for i, (_, c) in enumerate(buckets) if c >= rank)
    if b == len(buckets) - 1:
        return buckets[-2][0], (buckets[-2][0], math.inf)
    if b == 0 and buckets[0][0] <= 0:
        return buckets[0][0], (-math.inf, buckets[0][0])
    start, end = (0.0 if b == 0 else buckets[b - 1][0]), buckets[b][0]
    below = 0.0 if b == 0 else buckets[b - 1][1]
    in_bucket = buckets[b][1] - below
    return start + (end - start) * (rank - below) / in_bucket, (start, end)


def fmt(x):
    return "%.4g" % x if math.isfinite(x) else str(x)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--before")
    ap.add_argument("--target", type=float)
    ap.add_argument("metric")
    ap.add_argument("after")
    ap.add_argument("q", type=float, nargs="+")
    a = ap.parse_args()
    after, s_after = read(a.after, a.metric)
    before, s_before = read(a.before, a.metric)
    if not after:
        sys.exit(f"hist_quantile.py: no {a.metric}_bucket series in {a.after}")
    buckets = sorted((le, c - before.get(le, 0.0)) for le, c in after.items())
    count = buckets[-1][1]
    print(f"count={count:.0f}")
    print(f"mean={fmt((s_after - s_before) / count) if count else 'NaN'}")
    for q in a.q:
        v, bounds = bucket_quantile(q, buckets)
        name = "p" + ("%g" % (q * 100)).replace(".", "_")
        print(f"{name}={fmt(v)}")
        print(f"{name}_bucket=" + (f"({fmt(bounds[0])},{fmt(bounds[1])}]" if bounds else "-"))
    if a.target is not None and count:
        finite = [b for b in buckets if math.isfinite(b[0])]
        lower = [b for b in finite if b[0] <= a.target][-1:]
        upper = [b for b in finite if b[0] >= a.target][:1]
        for le, c in {b[0]: b for b in lower + upper}.values():
            print(f"le_{fmt(le)}={c / count:.4f}")


if __name__ == "__main__":
    main()
