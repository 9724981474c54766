-- Example queries over the credit and paths tables (postgres.sql, duckdb.sql).
-- Each runs unchanged on PostgreSQL and DuckDB. deploy/warehouse/check_warehouse.py
-- runs them on both against the sample data and checks the results.
-- Each query starts with a "-- name:" line. Change the dates, goal and models
-- in the params CTE.

-- name: credit_by_channel_and_model
-- Conversions credited to each channel by each model in May 2026 (UTC), with
-- the credited value in one currency. Within a model, the conversions column
-- sums to the number of conversions in the month (fractions sum to 1).
WITH params AS (
    SELECT TIMESTAMPTZ '2026-05-01 00:00:00+00' AS month_start,
           TIMESTAMPTZ '2026-06-01 00:00:00+00' AS month_end,
           'USD' AS report_currency
)
SELECT c.model,
       c.channel,
       sum(c.credit) AS conversions,
       coalesce(sum(c.credited_value) FILTER (WHERE c.currency = p.report_currency), 0) AS credited_value,
       count(DISTINCT c.conversion_id) AS conversions_touched
FROM credit c
CROSS JOIN params p
WHERE c.conversion_timestamp >= p.month_start
  AND c.conversion_timestamp < p.month_end
GROUP BY c.model, c.channel
ORDER BY c.model, conversions DESC, c.channel;

-- name: model_difference_by_channel
-- How credit moves between channels when switching from model_a to model_b,
-- for May 2026: conversions credited per channel under each model and the
-- difference. The differences sum to 0 over all channels.
WITH params AS (
    SELECT TIMESTAMPTZ '2026-05-01 00:00:00+00' AS month_start,
           TIMESTAMPTZ '2026-06-01 00:00:00+00' AS month_end,
           'last_touch' AS model_a,
           'markov' AS model_b
),
per_channel AS (
    SELECT c.channel,
           coalesce(sum(c.credit) FILTER (WHERE c.model = p.model_a), 0) AS credit_a,
           coalesce(sum(c.credit) FILTER (WHERE c.model = p.model_b), 0) AS credit_b
    FROM credit c
    CROSS JOIN params p
    WHERE c.conversion_timestamp >= p.month_start
      AND c.conversion_timestamp < p.month_end
      AND c.model IN (p.model_a, p.model_b)
    GROUP BY c.channel
)
SELECT channel,
       credit_a,
       credit_b,
       credit_b - credit_a AS difference,
       CASE WHEN credit_a > 0 THEN (credit_b - credit_a) / credit_a END AS relative_change
FROM per_channel
ORDER BY difference DESC, channel;

-- name: credit_not_summing_to_one
-- Data check: conversions whose credit under a model does not sum to 1
-- (the contract allows 1e-9). Expected to return no rows; a row usually means
-- a partial load.
SELECT conversion_id, model, count(*) AS row_count, sum(credit) AS total_credit
FROM credit
GROUP BY conversion_id, model
HAVING abs(sum(credit) - 1) > 1e-9
ORDER BY conversion_id, model;

-- name: paths_by_channel
-- Closed paths that contain each channel, converting and not: the raw counts
-- behind the data-driven models (a path counts once per distinct channel).
SELECT u.channel,
       count(DISTINCT p.path_id) FILTER (WHERE p.converted) AS converting_paths,
       count(DISTINCT p.path_id) FILTER (WHERE NOT p.converted) AS non_converting_paths
FROM paths p
CROSS JOIN unnest(p.channels) AS u(channel)
GROUP BY u.channel
ORDER BY u.channel;
