-- apportion output tables for DuckDB (tested with DuckDB 1.x from Python).
-- Load: duckdb warehouse.duckdb < deploy/warehouse/duckdb.sql
--
-- Same columns, meanings and types as postgres.sql (double precision is
-- DOUBLE, text is VARCHAR, text[] is VARCHAR[]). No secondary indexes: DuckDB
-- scans columns and prunes by min/max per row group, so load rows roughly in
-- conversion_timestamp order (as the service emits them) for fast time filters.

CREATE TABLE IF NOT EXISTS credit (
    credit_id            VARCHAR     NOT NULL PRIMARY KEY,
    conversion_id        VARCHAR     NOT NULL,
    user_key             VARCHAR     NOT NULL,
    model                VARCHAR     NOT NULL,
    model_version        VARCHAR,
    goal                 VARCHAR     NOT NULL,
    touch_event_id       VARCHAR,
    channel              VARCHAR     NOT NULL,
    campaign             VARCHAR,
    interaction          VARCHAR,
    position             INTEGER     NOT NULL CHECK (position >= 0),
    path_length          INTEGER     NOT NULL CHECK (path_length >= 0),
    touch_timestamp      TIMESTAMPTZ,
    conversion_timestamp TIMESTAMPTZ NOT NULL,
    credit               DOUBLE      NOT NULL CHECK (credit >= 0 AND credit <= 1),
    credited_value       DOUBLE,
    currency             VARCHAR,
    CHECK (position <= path_length),
    -- The unattributed row has position 0, path_length 0 and no touch.
    CHECK ((position = 0) = (touch_event_id IS NULL)),
    CHECK (model IN ('last_touch', 'first_touch', 'linear', 'time_decay', 'u_shaped', 'shapley', 'markov')),
    CHECK (interaction IN ('click', 'view')),
    CHECK (regexp_full_match(currency, '[A-Z]{3}'))
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

CREATE TABLE IF NOT EXISTS paths (
    path_id               VARCHAR     NOT NULL PRIMARY KEY,
    user_key              VARCHAR     NOT NULL,
    converted             BOOLEAN     NOT NULL,
    conversion_id         VARCHAR,
    goal                  VARCHAR,
    channels              VARCHAR[]   NOT NULL,
    touch_count           INTEGER     NOT NULL CHECK (touch_count >= 1),
    first_touch_timestamp TIMESTAMPTZ NOT NULL,
    last_touch_timestamp  TIMESTAMPTZ NOT NULL,
    CHECK (first_touch_timestamp <= last_touch_timestamp),
    CHECK (len(channels) = touch_count),
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

-- Loading credit NDJSON (file sink output, or a dump of the credit topic);
-- rows already loaded are skipped:
--
--   INSERT OR IGNORE INTO credit BY NAME
--   SELECT * FROM read_json('credit.ndjson', format = 'newline_delimited',
--       columns = {credit_id: 'VARCHAR', conversion_id: 'VARCHAR', user_key: 'VARCHAR',
--                  model: 'VARCHAR', model_version: 'VARCHAR', goal: 'VARCHAR',
--                  touch_event_id: 'VARCHAR', channel: 'VARCHAR', campaign: 'VARCHAR',
--                  interaction: 'VARCHAR', position: 'INTEGER', path_length: 'INTEGER',
--                  touch_timestamp: 'TIMESTAMPTZ', conversion_timestamp: 'TIMESTAMPTZ',
--                  credit: 'DOUBLE', credited_value: 'DOUBLE', currency: 'VARCHAR'});
