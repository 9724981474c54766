//! PostgreSQL tables `credit` and `paths`.
//!
//! The tables are those of `deploy/warehouse/postgres.sql` (same names,
//! columns, types, checks and indexes); [`DDL`] is a copy of its `CREATE`
//! statements, because the service image is built without `deploy/`. A test
//! creates both in two schemas of a real server and compares the catalogs.
//! They live in [`PostgresOptions::schema`] (default `public`): the sink
//! sets `search_path` to that schema on every connection and, unless told
//! not to, creates the schema and the tables when they are missing.
//!
//! ## Delivery
//!
//! Each batch is one transaction: multi-row `INSERT … ON CONFLICT (credit_id)
//! DO NOTHING` for the credit rows and `ON CONFLICT (path_id) DO NOTHING` for
//! the paths, at most [`PostgresOptions::rows_per_statement`] rows a
//! statement. `write()` returns after `COMMIT`, so the rows are durable at the
//! server. A re-delivered batch (the service re-sends after a crash or a
//! failed write) inserts nothing twice, even when the first `COMMIT` went
//! through and only its answer was lost. Dead letters are not written here.
//!
//! ## Errors
//!
//! Lost or refused connections, timeouts, serialization failures, deadlocks
//! and a server short of resources or shutting down are retryable: the
//! connection is dropped, `write()` sleeps with exponential backoff
//! (`initial_backoff`, doubling, at most `max_backoff`), reconnects and tries
//! the batch again, up to `max_retries` times, then returns a retryable
//! [`SinkError`] (the service backs off or pauses and calls `write()` again,
//! which reconnects). Rows the tables reject (a check constraint, bad data)
//! and failed authentication are permanent errors. Messages never contain the
//! password of the URL.
//!
//! Only plain TCP or Unix-socket connections are made (no TLS client is
//! linked): a URL with `sslmode=require` is refused with a permanent error
//! (`sslmode=prefer`, the default, falls back to plain TCP).

use std::str::FromStr;
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use apportion_engine::time_fmt::parse_rfc3339_ms;
use apportion_engine::{CreditRow, PathRow};
use postgres::error::SqlState;
use postgres::types::ToSql;
use postgres::{Client, Config, NoTls, Statement, Transaction};

use crate::{OutputBatch, Sink, SinkError};

const SINK: &str = "postgres";

/// The `CREATE` statements of `deploy/warehouse/postgres.sql` (tables,
/// checks and indexes; the column comments stay in that file). Run with
/// `search_path` set to the target schema.
pub const DDL: &str = r#"
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
    CHECK ((position = 0) = (touch_event_id IS NULL)),
    CHECK (model IN ('last_touch', 'first_touch', 'linear', 'time_decay', 'u_shaped', 'shapley', 'markov')),
    CHECK (interaction IN ('click', 'view')),
    CHECK (currency ~ '^[A-Z]{3}$')
);
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
CREATE INDEX IF NOT EXISTS paths_last_touch_timestamp_idx ON paths (last_touch_timestamp);
CREATE INDEX IF NOT EXISTS paths_conversion_id_idx ON paths (conversion_id);
"#;

const CREDIT_COLUMNS: &str = "credit_id, conversion_id, user_key, model, model_version, goal, touch_event_id, \
     channel, campaign, interaction, position, path_length, touch_timestamp, conversion_timestamp, credit, \
     credited_value, currency";
const CREDIT_WIDTH: usize = 17;
const PATH_COLUMNS: &str =
    "path_id, user_key, converted, conversion_id, goal, channels, touch_count, first_touch_timestamp, last_touch_timestamp";
const PATH_WIDTH: usize = 9;
/// PostgreSQL accepts at most 65535 parameters in one statement.
const MAX_PARAMS: usize = 65_535;

/// Settings of the PostgreSQL sink.
#[derive(Debug, Clone, PartialEq)]
pub struct PostgresOptions {
    /// Schema of the tables (created when missing and `create_tables`).
    pub schema: String,
    /// Create the schema and the tables when missing.
    pub create_tables: bool,
    /// Retries of one batch inside `write()` after the first attempt.
    pub max_retries: u32,
    /// Sleep before the first retry; doubles after each.
    pub initial_backoff: Duration,
    /// Longest sleep between retries.
    pub max_backoff: Duration,
    /// TCP connect timeout, unless the URL sets `connect_timeout`.
    pub connect_timeout: Duration,
    /// Server-side `statement_timeout` of the sink's session (`None`: the server's).
    pub statement_timeout: Option<Duration>,
    /// Rows per `INSERT` statement (capped so parameters stay under 65535).
    pub rows_per_statement: usize,
}

impl Default for PostgresOptions {
    fn default() -> Self {
        PostgresOptions {
            schema: "public".to_string(),
            create_tables: true,
            max_retries: 5,
            initial_backoff: Duration::from_millis(200),
            max_backoff: Duration::from_secs(10),
            connect_timeout: Duration::from_secs(10),
            statement_timeout: Some(Duration::from_secs(60)),
            rows_per_statement: 1000,
        }
    }
}

/// Rows inserted and rows skipped as already present, by the last `write()`.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct WriteCounts {
    /// Credit rows inserted.
    pub credit_inserted: u64,
    /// Credit rows whose `credit_id` was already there.
    pub credit_skipped: u64,
    /// Path rows inserted.
    pub paths_inserted: u64,
    /// Path rows whose `path_id` was already there.
    pub paths_skipped: u64,
}

/// A live connection and its prepared full-size statements.
struct Conn {
    client: Client,
    credit_full: Option<Statement>,
    paths_full: Option<Statement>,
}

/// The PostgreSQL sink.
pub struct PostgresSink {
    config: Config,
    target: String,
    opts: PostgresOptions,
    conn: Option<Conn>,
    last: WriteCounts,
}

impl std::fmt::Debug for PostgresSink {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PostgresSink")
            .field("target", &self.target)
            .field("opts", &self.opts)
            .field("connected", &self.conn.is_some())
            .finish()
    }
}

/// Quotes an SQL identifier.
pub fn quote_ident(s: &str) -> String {
    format!("\"{}\"", s.replace('"', "\"\""))
}

/// Whether retrying after `e` may succeed.
pub fn is_retryable(e: &postgres::Error) -> bool {
    if e.is_closed() {
        return true;
    }
    let Some(code) = e.code() else {
        // No SQLSTATE. The client's error kinds are visible only through
        // their text: failing to connect, IO, timeouts and a garbled
        // exchange may pass; TLS, authentication, configuration and
        // parameter encoding problems will not.
        let text = e.to_string();
        return [
            "error connecting to server",
            "error communicating with the server",
            "timeout waiting for server",
            "unexpected message from server",
            "error parsing response from server",
        ]
        .iter()
        .any(|p| text.starts_with(p));
    };
    let c = code.code();
    // 08 connection exception, 40 transaction rollback (serialization
    // failure, deadlock), 53 insufficient resources, 57 operator
    // intervention (shutdown, query canceled by statement_timeout), 58
    // system error; 55P03 lock not available. (PostgreSQL manual,
    // appendix A, "PostgreSQL Error Codes".)
    ["08", "40", "53", "57", "58"].iter().any(|p| c.starts_with(p)) || *code == SqlState::LOCK_NOT_AVAILABLE
}

fn pg_error(target: &str, what: &str, e: &postgres::Error) -> SinkError {
    let detail = match e.as_db_error() {
        Some(db) => format!("{what} at {target}: {} (SQLSTATE {})", db.message(), db.code().code()),
        None => match std::error::Error::source(e) {
            Some(cause) => format!("{what} at {target}: {e}: {cause}"),
            None => format!("{what} at {target}: {e}"),
        },
    };
    if is_retryable(e) {
        SinkError::retry(SINK, detail)
    } else {
        SinkError::fatal(SINK, detail)
    }
}

/// `host:port/dbname` of a config, without user or password.
fn describe(config: &Config) -> String {
    let host = match config.get_hosts().first() {
        Some(postgres::config::Host::Tcp(h)) => h.clone(),
        #[cfg(unix)]
        Some(postgres::config::Host::Unix(p)) => p.display().to_string(),
        None => "localhost".to_string(),
    };
    let port = config.get_ports().first().copied().unwrap_or(5432);
    format!("{host}:{port}/{}", config.get_dbname().unwrap_or("(default database)"))
}

fn ms_to_system_time(field: &str, s: &str) -> Result<SystemTime, SinkError> {
    let ms =
        parse_rfc3339_ms(s).ok_or_else(|| SinkError::fatal(SINK, format!("{field} is not an RFC 3339 time: {s:?}")))?;
    Ok(if ms >= 0 {
        UNIX_EPOCH + Duration::from_millis(ms as u64)
    } else {
        UNIX_EPOCH - Duration::from_millis(ms.unsigned_abs())
    })
}

fn int4(field: &str, v: u32) -> Result<i32, SinkError> {
    i32::try_from(v).map_err(|_| SinkError::fatal(SINK, format!("{field} {v} does not fit integer")))
}

fn values_sql(table: &str, columns: &str, width: usize, rows: usize, key: &str) -> String {
    let mut sql = format!("INSERT INTO {table} ({columns}) VALUES ");
    for r in 0..rows {
        if r > 0 {
            sql.push(',');
        }
        sql.push('(');
        for c in 0..width {
            if c > 0 {
                sql.push(',');
            }
            sql.push_str(&format!("${}", r * width + c + 1));
        }
        sql.push(')');
    }
    sql.push_str(&format!(" ON CONFLICT ({key}) DO NOTHING"));
    sql
}

/// Typed values of one credit row that are not plain fields.
struct CreditExtra {
    position: i32,
    path_length: i32,
    touch_ts: Option<SystemTime>,
    conversion_ts: SystemTime,
}

fn credit_extra(r: &CreditRow) -> Result<CreditExtra, SinkError> {
    Ok(CreditExtra {
        position: int4("position", r.position)?,
        path_length: int4("path_length", r.path_length)?,
        touch_ts: r.touch_timestamp.as_deref().map(|t| ms_to_system_time("touch_timestamp", t)).transpose()?,
        conversion_ts: ms_to_system_time("conversion_timestamp", &r.conversion_timestamp)?,
    })
}

struct PathExtra {
    touch_count: i32,
    first_ts: SystemTime,
    last_ts: SystemTime,
}

fn path_extra(r: &PathRow) -> Result<PathExtra, SinkError> {
    Ok(PathExtra {
        touch_count: int4("touch_count", r.touch_count)?,
        first_ts: ms_to_system_time("first_touch_timestamp", &r.first_touch_timestamp)?,
        last_ts: ms_to_system_time("last_touch_timestamp", &r.last_touch_timestamp)?,
    })
}

impl PostgresSink {
    /// Parses `url` (a `postgres://` URL or a `key=value` string), connects
    /// (retrying as `write()` does), and creates the schema and tables when
    /// asked to. A malformed URL is a permanent error; a server that cannot
    /// be reached is a retryable one.
    pub fn connect(url: &str, opts: PostgresOptions) -> Result<Self, SinkError> {
        let mut config =
            Config::from_str(url).map_err(|e| SinkError::fatal(SINK, format!("bad PostgreSQL connection URL: {e}")))?;
        if config.get_connect_timeout().is_none() {
            config.connect_timeout(opts.connect_timeout);
        }
        if config.get_application_name().is_none() {
            config.application_name("apportion");
        }
        if config.get_ssl_mode() == postgres::config::SslMode::Require {
            return Err(SinkError::fatal(SINK, "sslmode=require asks for TLS, which this sink does not support"));
        }
        if opts.schema.is_empty() {
            return Err(SinkError::fatal(SINK, "schema name is empty"));
        }
        let target = describe(&config);
        let mut sink = PostgresSink { config, target, opts, conn: None, last: WriteCounts::default() };
        sink.with_retries(|s| s.ensure_conn().map(|_| ()))?;
        Ok(sink)
    }

    /// `host:port/dbname` of the server (no credentials).
    pub fn target(&self) -> &str {
        &self.target
    }

    /// Counts of the last successful `write()`.
    pub fn last_counts(&self) -> WriteCounts {
        self.last
    }

    fn error(&self, what: &str, e: &postgres::Error) -> SinkError {
        pg_error(&self.target, what, e)
    }

    fn ensure_conn(&mut self) -> Result<&mut Conn, SinkError> {
        if self.conn.as_ref().is_some_and(|c| c.client.is_closed()) {
            self.conn = None;
        }
        if self.conn.is_none() {
            let mut client = self.config.connect(NoTls).map_err(|e| self.error("connect", &e))?;
            let schema = quote_ident(&self.opts.schema);
            let mut setup = String::new();
            if self.opts.create_tables {
                setup.push_str(&format!("CREATE SCHEMA IF NOT EXISTS {schema};"));
            }
            setup.push_str(&format!("SET search_path TO {schema};"));
            if let Some(t) = self.opts.statement_timeout {
                setup.push_str(&format!("SET statement_timeout = {};", t.as_millis().max(1)));
            }
            client.batch_execute(&setup).map_err(|e| self.error("session setup", &e))?;
            if self.opts.create_tables {
                client.batch_execute(DDL).map_err(|e| self.error("create tables", &e))?;
            }
            self.conn = Some(Conn { client, credit_full: None, paths_full: None });
        }
        Ok(self.conn.as_mut().expect("connected above"))
    }

    /// Runs `f` until it succeeds, fails permanently, or `max_retries`
    /// retries are used; drops the connection after each retryable failure.
    fn with_retries<T>(&mut self, mut f: impl FnMut(&mut Self) -> Result<T, SinkError>) -> Result<T, SinkError> {
        let mut backoff = self.opts.initial_backoff;
        let mut attempt = 0u32;
        loop {
            match f(self) {
                Ok(v) => return Ok(v),
                Err(e) if !e.retryable => {
                    // Start the next call on a fresh session (and fresh statements).
                    self.conn = None;
                    return Err(e);
                }
                Err(e) => {
                    self.conn = None;
                    if attempt >= self.opts.max_retries {
                        let tries = attempt + 1;
                        return Err(SinkError::retry(SINK, format!("{} (gave up after {tries} attempts)", e.detail)));
                    }
                    std::thread::sleep(backoff);
                    backoff = (backoff * 2).min(self.opts.max_backoff);
                    attempt += 1;
                }
            }
        }
    }

    fn chunk_rows(&self, width: usize) -> usize {
        self.opts.rows_per_statement.clamp(1, MAX_PARAMS / width)
    }

    fn try_write(&mut self, batch: &OutputBatch) -> Result<WriteCounts, SinkError> {
        let credit_extra: Vec<CreditExtra> = batch.credit.iter().map(credit_extra).collect::<Result<_, _>>()?;
        let path_extra: Vec<PathExtra> = batch.paths.iter().map(path_extra).collect::<Result<_, _>>()?;
        let credit_chunk = self.chunk_rows(CREDIT_WIDTH);
        let path_chunk = self.chunk_rows(PATH_WIDTH);
        let target = self.target.clone();
        let err = |what: &str, e: postgres::Error| pg_error(&target, what, &e);
        let conn = self.ensure_conn()?;
        let mut counts = WriteCounts::default();
        let mut tx = conn.client.transaction().map_err(|e| err("begin", e))?;
        for (rows, extra) in batch.credit.chunks(credit_chunk).zip(credit_extra.chunks(credit_chunk)) {
            let stmt = statement(&mut tx, &mut conn.credit_full, rows.len() == credit_chunk, || {
                values_sql("credit", CREDIT_COLUMNS, CREDIT_WIDTH, rows.len(), "credit_id")
            })
            .map_err(|e| err("prepare credit insert", e))?;
            let mut params: Vec<&(dyn ToSql + Sync)> = Vec::with_capacity(rows.len() * CREDIT_WIDTH);
            for (r, x) in rows.iter().zip(extra) {
                params.extend_from_slice(&[
                    &r.credit_id,
                    &r.conversion_id,
                    &r.user_key,
                    &r.model,
                    &r.model_version,
                    &r.goal,
                    &r.touch_event_id,
                    &r.channel,
                    &r.campaign,
                    &r.interaction,
                    &x.position,
                    &x.path_length,
                    &x.touch_ts,
                    &x.conversion_ts,
                    &r.credit,
                    &r.credited_value,
                    &r.currency,
                ]);
            }
            let n = tx.execute(&stmt, &params).map_err(|e| err("insert credit", e))?;
            counts.credit_inserted += n;
            counts.credit_skipped += rows.len() as u64 - n;
        }
        for (rows, extra) in batch.paths.chunks(path_chunk).zip(path_extra.chunks(path_chunk)) {
            let stmt = statement(&mut tx, &mut conn.paths_full, rows.len() == path_chunk, || {
                values_sql("paths", PATH_COLUMNS, PATH_WIDTH, rows.len(), "path_id")
            })
            .map_err(|e| err("prepare paths insert", e))?;
            let mut params: Vec<&(dyn ToSql + Sync)> = Vec::with_capacity(rows.len() * PATH_WIDTH);
            for (r, x) in rows.iter().zip(extra) {
                params.extend_from_slice(&[
                    &r.path_id,
                    &r.user_key,
                    &r.converted,
                    &r.conversion_id,
                    &r.goal,
                    &r.channels,
                    &x.touch_count,
                    &x.first_ts,
                    &x.last_ts,
                ]);
            }
            let n = tx.execute(&stmt, &params).map_err(|e| err("insert paths", e))?;
            counts.paths_inserted += n;
            counts.paths_skipped += rows.len() as u64 - n;
        }
        tx.commit().map_err(|e| err("commit", e))?;
        Ok(counts)
    }
}

/// The insert statement for a chunk: the cached full-size one, or one
/// prepared for this size.
fn statement(
    tx: &mut Transaction<'_>,
    cache: &mut Option<Statement>,
    full: bool,
    sql: impl FnOnce() -> String,
) -> Result<Statement, postgres::Error> {
    if full {
        if let Some(s) = cache {
            return Ok(s.clone());
        }
        let s = tx.prepare(&sql())?;
        *cache = Some(s.clone());
        return Ok(s);
    }
    tx.prepare(&sql())
}

impl Sink for PostgresSink {
    fn name(&self) -> &'static str {
        SINK
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        if batch.credit.is_empty() && batch.paths.is_empty() {
            return Ok(());
        }
        self.last = self.with_retries(|s| s.try_write(batch))?;
        Ok(())
    }

    fn close(&mut self) -> Result<(), SinkError> {
        if let Some(c) = self.conn.take() {
            c.client.close().map_err(|e| self.error("close", &e))?;
        }
        Ok(())
    }
}
