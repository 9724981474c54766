-- apportion output tables for PostgreSQL (tested with PostgreSQL 15).
-- Load: psql -v ON_ERROR_STOP=1 -f deploy/warehouse/postgres.sql
--
-- credit: one row per credit row of the service (docs/contract.md, "Credit
-- rows"). credit_id is deterministic, so loading the same rows
-- twice is harmless with ON CONFLICT (credit_id) DO NOTHING.
-- paths: one row per closed path (the paths topic).

CREATE TABLE IF NOT EXISTS credit (
    credit_id            text             NOT NULL PRIMARY KEY,
    conversion_id        text             NOT NULL,
    user_key             text             NOT NULL,
    model                text             NOT NULL,
    model_version        text,
    goal                 text             NOT NULL,
    touch_event_id       text,
    channel              text             NOT NULL,
    campaign             text,
    interaction          text,
    position             integer          NOT NULL CHECK (position >= 0),
    path_length          integer          NOT NULL CHECK (path_length >= 0),
    touch_timestamp      timestamptz,
    conversion_timestamp timestamptz      NOT NULL,
    credit               double precision NOT NULL CHECK (credit >= 0 AND credit <= 1),
    credited_value       double precision,
    currency             text,
    CHECK (position <= path_length),
    -- The unattributed row has position 0, path_length 0 and no touch.
    CHECK ((position = 0) = (touch_event_id IS NULL)),
    CHECK (model IN ('last_touch', 'first_touch', 'linear', 'time_decay', 'u_shaped', 'shapley', 'markov')),
    CHECK (interaction IN ('click', 'view')),
    CHECK (currency ~ '^[A-Z]{3}$')
);

COMMENT ON TABLE credit IS 'Credit rows: one per touch of the eligible path per model (touches given 0 included), or one unattributed row per model.';
COMMENT ON COLUMN credit.credit_id IS 'Deterministic from (conversion event_id, model, position): the same input gives the same id, so a sink can deduplicate.';
COMMENT ON COLUMN credit.conversion_id IS 'The conversion''s event_id.';
COMMENT ON COLUMN credit.user_key IS 'Pseudonymous user key (hex of HMAC-SHA256 of the user id), never the raw id.';
COMMENT ON COLUMN credit.model IS 'Model name: last_touch, first_touch, linear, time_decay, u_shaped, shapley or markov.';
COMMENT ON COLUMN credit.model_version IS 'Snapshot id for data-driven models (shapley, markov); null for rule-based models.';
COMMENT ON COLUMN credit.goal IS 'The conversion''s goal (default conversion).';
COMMENT ON COLUMN credit.touch_event_id IS 'event_id of the credited touch; null for unattributed.';
COMMENT ON COLUMN credit.channel IS 'Channel of the touch, or unattributed when the conversion had no eligible touch.';
COMMENT ON COLUMN credit.campaign IS 'Campaign of the touch, if any.';
COMMENT ON COLUMN credit.interaction IS 'How the touch happened: click or view; null for unattributed.';
COMMENT ON COLUMN credit.position IS '1-based position of the touch in the eligible path; 0 for unattributed.';
COMMENT ON COLUMN credit.path_length IS 'Number of eligible touches; 0 for unattributed.';
COMMENT ON COLUMN credit.touch_timestamp IS 'Event time of the touch; null for unattributed.';
COMMENT ON COLUMN credit.conversion_timestamp IS 'Event time of the conversion.';
COMMENT ON COLUMN credit.credit IS 'Fraction of the conversion given to this touch by this model; the rows of one conversion and model sum to 1.';
COMMENT ON COLUMN credit.credited_value IS 'credit * value when the conversion has a value, else null.';
COMMENT ON COLUMN credit.currency IS 'ISO 4217 code of the conversion value, if given.';

-- Reports filter by conversion time and model.
CREATE INDEX IF NOT EXISTS credit_conversion_timestamp_model_idx ON credit (conversion_timestamp, model);
CREATE INDEX IF NOT EXISTS credit_model_conversion_timestamp_idx ON credit (model, conversion_timestamp);
CREATE INDEX IF NOT EXISTS credit_conversion_id_idx ON credit (conversion_id);

CREATE TABLE IF NOT EXISTS paths (
    path_id               text        NOT NULL PRIMARY KEY,
    user_key              text        NOT NULL,
    converted             boolean     NOT NULL,
    conversion_id         text,
    goal                  text,
    channels              text[]      NOT NULL,
    touch_count           integer     NOT NULL CHECK (touch_count >= 1),
    first_touch_timestamp timestamptz NOT NULL,
    last_touch_timestamp  timestamptz NOT NULL,
    CHECK (first_touch_timestamp <= last_touch_timestamp),
    CHECK (cardinality(channels) = touch_count),
    CHECK (converted = (conversion_id IS NOT NULL))
);

COMMENT ON TABLE paths IS 'Closed paths (every closed journey with at least one touch), the input of the data-driven models.';
COMMENT ON COLUMN paths.path_id IS 'Id of the closed path, as in the paths output.';
COMMENT ON COLUMN paths.user_key IS 'Pseudonymous user key (hex), never the raw id.';
COMMENT ON COLUMN paths.converted IS 'true for a converting path (closed by a conversion), false for an expired journey.';
COMMENT ON COLUMN paths.conversion_id IS 'event_id of the conversion that closed the path; null when not converted.';
COMMENT ON COLUMN paths.goal IS 'Goal of that conversion; null when not converted.';
COMMENT ON COLUMN paths.channels IS 'Channel of each touch of the path, in path order (event time, ties by arrival).';
COMMENT ON COLUMN paths.touch_count IS 'Number of touches in the path.';
COMMENT ON COLUMN paths.first_touch_timestamp IS 'Event time of the first touch.';
COMMENT ON COLUMN paths.last_touch_timestamp IS 'Event time of the last touch.';

CREATE INDEX IF NOT EXISTS paths_last_touch_timestamp_idx ON paths (last_touch_timestamp);
CREATE INDEX IF NOT EXISTS paths_conversion_id_idx ON paths (conversion_id);

-- Loading credit NDJSON (one JSON object per line, as written by the file sink
-- or read from the credit topic) through a staging table; rows already loaded
-- are skipped:
--
--   CREATE TEMP TABLE credit_staging (doc jsonb);
--   \copy credit_staging (doc) FROM 'credit.ndjson' WITH (FORMAT text)
--   INSERT INTO credit
--   SELECT r.* FROM credit_staging s,
--        jsonb_populate_record(NULL::credit, s.doc) AS r
--   ON CONFLICT (credit_id) DO NOTHING;
--
-- (FORMAT text treats backslashes as escapes; for JSON with backslashes use
-- FORMAT csv with QUOTE and DELIMITER set to characters that never occur,
-- e.g. E'\x01' and E'\x02'.)
