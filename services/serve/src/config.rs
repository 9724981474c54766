//! Typed configuration: defaults, then the TOML file, then `APPORTION_*`
//! environment variables, then command-line flags.
//!
//! Every field is documented in [`DEFAULT_CONFIG`], the file printed by
//! `apportion config --print-default`; a test checks that this file parses to
//! exactly [`Config::default`] and mentions every field, so the reference
//! cannot drift from the structs.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use apportion_contract::{ModelId, Period};
use apportion_engine::journey::Rules;
use apportion_engine::registry::{check_params, ModelPlan, RuleParams};
pub use apportion_sinks::parquet::ParquetConfig;
pub use apportion_sinks::postgres::{OnUnavailable, PostgresConfig};
use serde::{Deserialize, Serialize};

/// The documented default configuration file.
pub const DEFAULT_CONFIG: &str = include_str!("default_config.toml");

/// The largest `max_event_bytes` accepted: well below the longest line the
/// file follower reads (64 MiB), so a longer line is always rejected as
/// `too_large`.
pub const MAX_EVENT_BYTES_LIMIT: usize = 16 << 20;

/// Default of `embedded.max_body_bytes`: 16 MiB.
pub const DEFAULT_MAX_BODY_BYTES: usize = 16 << 20;

/// The largest `embedded.max_body_bytes` accepted: 1 GiB.
pub const MAX_BODY_BYTES_LIMIT: usize = 1 << 30;

/// What to do with an event older than the watermark.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum LatePolicy {
    /// Send it to the dead-letter output with reason `late`.
    #[default]
    DeadLetter,
    /// Apply it anyway (it joins the user's open journey).
    Apply,
}

/// Log format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum LogFormat {
    /// Human format on a terminal, JSON otherwise.
    #[default]
    Auto,
    /// Always human-readable text.
    Text,
    /// Always one JSON object per line.
    Json,
}

/// Topic payload encoding.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Format {
    /// One JSON object per message.
    #[default]
    Json,
    /// The protobuf encoding of proto/apportion/v1.
    Protobuf,
}

/// The whole configuration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Config {
    /// Where sled keeps state; absent: a temporary directory (replay) or `./apportion-data` (serve).
    pub data_dir: Option<String>,
    /// Models to run, in output order.
    pub models: Vec<ModelId>,
    /// Lookback window for clicks.
    pub lookback: Period,
    /// Lookback window for views; empty means the same as `lookback`.
    pub view_lookback: Option<Period>,
    /// A journey closes as non-converting when last touch + expiry < watermark.
    pub expiry: Period,
    /// At most this many touches in one run of a journey (0: no cap); the
    /// oldest goes first (contract: Journey rules, Touch limits).
    pub max_touches_per_journey: usize,
    /// A touch is dropped once a newer touch of its run is more than this
    /// later (at least `lookback`; "0s": no limit).
    pub max_touch_age: Period,
    /// Half-life of `time_decay`.
    pub half_life: Period,
    /// `u_shaped` weight of the first touch (paths of 3 or more).
    pub u_shaped_first: f64,
    /// `u_shaped` weight of the last touch (paths of 3 or more).
    pub u_shaped_last: f64,
    /// Order of the `markov` chain (1 to 4).
    pub markov_order: usize,
    /// Most channels the path statistics of `shapley` and `markov` count
    /// under their own names; the others share the overflow bucket
    /// (docs/contract.md, "Models", Channel cap). 0: no cap.
    pub max_channels: usize,
    /// Secret key for pseudonymization (prefer the environment variable).
    pub pseudonym_key: Option<String>,
    /// Largest accepted event, in bytes.
    pub max_event_bytes: usize,
    /// Memory budget of the journey cache, in bytes.
    pub cache_bytes: usize,
    /// Streaming: how late an event may be and still count.
    pub allowed_lateness: Period,
    /// Streaming: what to do with events later than that.
    pub late_policy: LatePolicy,
    /// Streaming: after this long caught up with its input, a partition's watermark advances by processing time.
    pub idle_timeout: Period,
    /// Events more than this far ahead of processing time are rejected (`future_timestamp`).
    pub max_future_skew: Period,
    /// Streaming: how often the data-driven models are refitted.
    pub refit_interval: Period,
    /// Streaming: how long event ids are remembered for duplicate detection (event time).
    pub dedupe_horizon: Period,
    /// serve: how often the stored journeys are scanned for the age of the
    /// oldest event they hold (`0s`: never).
    pub state_scan_interval: Period,
    /// Streaming: number of events in one processing batch when input is
    /// light (the batch limit starts here and returns here).
    pub batch_size: usize,
    /// Streaming: the batch limit doubles while batches come back full (a
    /// backlog) up to this many events, to amortize commits.
    pub max_batch_size: usize,
    /// Streaming: shutdown grace period.
    pub shutdown_grace: Period,
    /// Admin HTTP listener.
    pub admin: AdminConfig,
    /// Embedded mode (no Kafka): HTTP ingest and files.
    pub embedded: EmbeddedConfig,
    /// Kafka source and sinks; absent means embedded mode.
    pub kafka: Option<KafkaConfig>,
    /// PostgreSQL sink, in addition to the Kafka or file output; absent means off.
    pub postgres: Option<PostgresConfig>,
    /// Parquet sink, in addition to the Kafka or file output; absent means off.
    pub parquet: Option<ParquetConfig>,
    /// Logging.
    pub log: LogConfig,
}

/// Admin HTTP listener.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct AdminConfig {
    /// Address of /metrics, /healthz, /readyz and /v1/models.
    pub listen: String,
    /// /readyz fails while consumer lag exceeds this many messages (0: no limit).
    pub max_ready_lag: u64,
    /// Keep a running comparison of the models for /v1/compare (a little
    /// work and memory per credited conversion).
    pub compare: bool,
    /// Bearer token of `POST /v1/erase` on this listener in Kafka mode
    /// (prefer APPORTION_ADMIN_TOKEN or token_file); without one the
    /// endpoint is off.
    pub token: Option<String>,
    /// A file holding that token (surrounding whitespace ignored).
    pub token_file: Option<String>,
}

/// Embedded mode.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct EmbeddedConfig {
    /// Address of the ingest endpoint (POST /v1/events); empty disables it.
    pub http_listen: String,
    /// An NDJSON file to follow; absent: none.
    pub watch_file: Option<String>,
    /// Directory of the rotating output files.
    pub output_dir: String,
    /// Rotate an output file after this many bytes.
    pub rotate_bytes: u64,
    /// Largest accepted body of one ingest request, in bytes (413 above).
    pub max_body_bytes: usize,
    /// Ingest requests waiting for the pipeline; when full, 429 with Retry-After.
    pub queue_requests: usize,
    /// Bearer token required by ingest (prefer APPORTION_EMBEDDED_TOKEN or token_file).
    pub token: Option<String>,
    /// A file holding the bearer token (surrounding whitespace ignored).
    pub token_file: Option<String>,
}

/// Kafka.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct KafkaConfig {
    /// Bootstrap servers.
    pub brokers: String,
    /// Consumer group.
    pub group_id: String,
    /// Input topics.
    pub input_topics: Vec<String>,
    /// Payload format of the input topics.
    pub input_format: Format,
    /// Credit rows topic.
    pub credit_topic: String,
    /// Closed paths topic.
    pub paths_topic: String,
    /// Dead-letter topic.
    pub dead_letter_topic: String,
    /// Audit records of erasures (JSON whatever `output_format` says).
    pub erasure_topic: String,
    /// Payload format of the output topics.
    pub output_format: Format,
    /// False: input is not keyed by user; events are first re-keyed through `repartition_topic`.
    pub input_keyed_by_user: bool,
    /// Internal topic keyed by user key (used when `input_keyed_by_user = false`).
    pub repartition_topic: String,
    /// Publish every commit of a partition's state to a compacted changelog
    /// topic (`<group_id>-<topic>-changelog`) and restore a partition from
    /// it when its local state is missing or older: state follows a
    /// partition to whichever instance of the group owns it.
    pub changelog: bool,
    /// Replication factor of the changelog topics the service creates; -1:
    /// the broker's default.
    pub changelog_replication_factor: i32,
    /// With a data-driven model: share path statistics through the
    /// compacted topic `<group_id>-path-stats`, so that every instance of
    /// the group fits on the statistics of every input partition (refit
    /// rounds, docs/contract.md "Fitting across instances").
    pub shared_path_stats: bool,
    /// How a batch's output, state and input offsets reach Kafka:
    /// `exactly_once` (one Kafka transaction per batch; needs the
    /// changelog) or `at_least_once` (for brokers without transactions).
    pub delivery: Delivery,
    /// This instance's name in its `transactional.id`,
    /// `<group_id>-<instance_id>` (`exactly_once`). Empty: a name made once
    /// per data dir and kept in the store. A restarted instance with the
    /// same name fences its predecessor.
    pub instance_id: String,
    /// Extra librdkafka properties (TLS, SASL, tuning), passed through as is.
    pub properties: std::collections::BTreeMap<String, String>,
}

/// Logging.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct LogConfig {
    /// auto, text or json.
    pub format: LogFormat,
    /// Filter, e.g. `info` or `apportion=debug`.
    pub level: String,
}

impl Default for Config {
    fn default() -> Self {
        Config {
            data_dir: None,
            models: ModelId::RULES.to_vec(),
            lookback: Period::days(30),
            view_lookback: None,
            expiry: Period::days(30),
            max_touches_per_journey: apportion_engine::journey::DEFAULT_MAX_TOUCHES,
            max_touch_age: Period(apportion_engine::journey::DEFAULT_MAX_AGE_MS),
            half_life: Period::days(7),
            u_shaped_first: 0.4,
            u_shaped_last: 0.4,
            markov_order: 1,
            max_channels: apportion_engine::datadriven::DEFAULT_MAX_CHANNELS,
            pseudonym_key: None,
            max_event_bytes: apportion_contract::event::DEFAULT_MAX_EVENT_BYTES,
            cache_bytes: 256 << 20,
            allowed_lateness: Period::seconds(5),
            late_policy: LatePolicy::DeadLetter,
            idle_timeout: Period::seconds(60),
            max_future_skew: Period(15 * 60_000),
            refit_interval: Period(15 * 60_000),
            dedupe_horizon: Period::days(7),
            state_scan_interval: Period(5 * 60_000),
            batch_size: 5000,
            max_batch_size: 50_000,
            shutdown_grace: Period::seconds(30),
            admin: AdminConfig::default(),
            embedded: EmbeddedConfig::default(),
            kafka: None,
            postgres: None,
            parquet: None,
            log: LogConfig::default(),
        }
    }
}

impl Default for AdminConfig {
    fn default() -> Self {
        AdminConfig { listen: "127.0.0.1:9464".into(), max_ready_lag: 0, compare: true, token: None, token_file: None }
    }
}

impl Default for EmbeddedConfig {
    fn default() -> Self {
        EmbeddedConfig {
            http_listen: "127.0.0.1:9465".into(),
            watch_file: None,
            output_dir: "apportion-out".into(),
            rotate_bytes: 64 << 20,
            max_body_bytes: DEFAULT_MAX_BODY_BYTES,
            queue_requests: 16,
            token: None,
            token_file: None,
        }
    }
}

/// How output, state and input offsets reach Kafka (docs/contract.md,
/// "Delivery").
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Delivery {
    /// Per batch, one Kafka transaction holds the output rows and the
    /// changelog records (the input offsets among them).
    ExactlyOnce,
    /// Output first, then state and offsets: a crash repeats output.
    AtLeastOnce,
}

impl KafkaConfig {
    /// The transactional.id of this instance (`exactly_once`), given the
    /// name the store made when `instance_id` is empty.
    pub fn transactional_id(&self, store_instance: &str) -> String {
        let name = if self.instance_id.is_empty() { store_instance } else { &self.instance_id };
        format!("{}-{name}", self.group_id)
    }

    /// The transactional.id of this instance's repartition stage
    /// (`exactly_once`, input not keyed by user).
    pub fn repartition_transactional_id(&self, store_instance: &str) -> String {
        format!("{}-repartition", self.transactional_id(store_instance))
    }

    /// The topics the main consumer group reads: the input topics, or the
    /// repartition topic when the input is not keyed by user.
    pub fn consumed_topics(&self) -> Vec<String> {
        if self.input_keyed_by_user {
            self.input_topics.clone()
        } else {
            vec![self.repartition_topic.clone()]
        }
    }

    /// The topic the instances of the group share path statistics through.
    pub fn path_stats_topic(&self) -> String {
        format!("{}-path-stats", self.group_id)
    }

    /// The changelog topic of input (or repartition) topic `topic`.
    pub fn changelog_topic(&self, topic: &str) -> String {
        format!("{}-{topic}-changelog", self.group_id)
    }
}

/// Why `name` cannot be a Kafka topic name, if it cannot (Kafka's rule:
/// 1 to 249 characters of ASCII letters, digits, `.`, `_` and `-`, and not
/// `.` or `..`).
fn topic_name_problem(name: &str) -> Option<&'static str> {
    if name.is_empty() || name.len() > 249 {
        return Some("is not 1 to 249 characters long");
    }
    if name == "." || name == ".." {
        return Some("is reserved");
    }
    if !name.bytes().all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-')) {
        return Some("has characters other than ASCII letters, digits, '.', '_' and '-'");
    }
    None
}

impl Default for KafkaConfig {
    fn default() -> Self {
        KafkaConfig {
            brokers: "127.0.0.1:9092".into(),
            group_id: "apportion".into(),
            input_topics: vec!["events".into()],
            input_format: Format::Json,
            credit_topic: "credit".into(),
            paths_topic: "paths".into(),
            dead_letter_topic: "events-dead-letter".into(),
            erasure_topic: "apportion-erasures".into(),
            output_format: Format::Json,
            input_keyed_by_user: true,
            repartition_topic: "apportion-repartition".into(),
            changelog: true,
            changelog_replication_factor: -1,
            shared_path_stats: true,
            delivery: Delivery::ExactlyOnce,
            instance_id: String::new(),
            properties: Default::default(),
        }
    }
}

impl Default for LogConfig {
    fn default() -> Self {
        LogConfig { format: LogFormat::Auto, level: "info".into() }
    }
}

impl Config {
    /// Loads defaults, then `file` (if any), then `APPORTION_*` variables from `env`.
    pub fn load(file: Option<&Path>, env: impl IntoIterator<Item = (String, String)>) -> Result<Config> {
        let mut value = toml::Value::try_from(Config::default()).context("serializing defaults")?;
        if let Some(path) = file {
            let text =
                std::fs::read_to_string(path).with_context(|| format!("cannot read config file {}", path.display()))?;
            let file_value: toml::Value =
                toml::from_str(&text).with_context(|| format!("config file {} is not valid TOML", path.display()))?;
            merge(&mut value, file_value);
        }
        apply_env(&mut value, env)?;
        let cfg: Config = value.try_into().map_err(|e: toml::de::Error| {
            anyhow::anyhow!(
                "invalid configuration{}: {}",
                file.map(|p| format!(" in {}", p.display())).unwrap_or_default(),
                e.message()
            )
        })?;
        cfg.validate()?;
        Ok(cfg)
    }

    /// Checks values that types alone do not.
    pub fn validate(&self) -> Result<()> {
        if self.models.is_empty() {
            bail!("models must list at least one model");
        }
        for (i, m) in self.models.iter().enumerate() {
            if self.models[..i].contains(m) {
                bail!("model {m:?} is listed twice in models");
            }
        }
        check_params(&self.rule_params())?;
        if !(1..=MAX_EVENT_BYTES_LIMIT).contains(&self.max_event_bytes) {
            bail!(
                "max_event_bytes must be between 1 and {MAX_EVENT_BYTES_LIMIT} (16 MiB), got {}",
                self.max_event_bytes
            );
        }
        if self.lookback.ms() <= 0 || self.expiry.ms() <= 0 {
            bail!("lookback and expiry must be greater than 0");
        }
        if self.max_touch_age.ms() != 0 && self.max_touch_age.ms() < self.lookback.ms() {
            bail!(
                "max_touch_age ({}) is shorter than lookback ({}): it would drop touches a conversion may still credit; raise it, or set \"0s\" for no limit",
                self.max_touch_age,
                self.lookback
            );
        }
        if !(1..=4).contains(&self.markov_order) {
            bail!("markov_order must be 1, 2, 3 or 4, got {}", self.markov_order);
        }
        if self.batch_size == 0 {
            bail!("batch_size must be at least 1");
        }
        if self.max_batch_size < self.batch_size {
            bail!(
                "max_batch_size ({}) is smaller than batch_size ({}): raise max_batch_size or lower batch_size",
                self.max_batch_size,
                self.batch_size
            );
        }
        if !(1..=MAX_BODY_BYTES_LIMIT).contains(&self.embedded.max_body_bytes) {
            bail!(
                "embedded.max_body_bytes must be between 1 and {MAX_BODY_BYTES_LIMIT} (1 GiB), got {}",
                self.embedded.max_body_bytes
            );
        }
        if self.embedded.queue_requests == 0 {
            bail!("embedded.queue_requests must be at least 1");
        }
        if non_empty(&self.embedded.token).is_some() && non_empty(&self.embedded.token_file).is_some() {
            bail!("embedded.token and embedded.token_file are both set; keep one source of the ingest token");
        }
        if non_empty(&self.admin.token).is_some() && non_empty(&self.admin.token_file).is_some() {
            bail!("admin.token and admin.token_file are both set; keep one source of the admin token");
        }
        if let Some(k) = &self.kafka {
            if k.input_topics.is_empty() {
                bail!("kafka.input_topics must list at least one topic");
            }
            for key in k.properties.keys() {
                if let Some(why) = managed_kafka_property(key) {
                    bail!("kafka.properties.\"{key}\" cannot be set: {why}");
                }
            }
            if k.changelog {
                for t in &k.consumed_topics() {
                    let name = k.changelog_topic(t);
                    if let Some(why) = topic_name_problem(&name) {
                        bail!("the changelog topic of {t} would be {name:?}, which {why}; change kafka.group_id or set kafka.changelog = false");
                    }
                }
                if k.changelog_replication_factor == 0 || k.changelog_replication_factor < -1 {
                    bail!("kafka.changelog_replication_factor must be -1 (the broker's default) or at least 1");
                }
            }
            if k.delivery == Delivery::ExactlyOnce && !k.changelog {
                bail!("kafka.delivery = \"exactly_once\" needs kafka.changelog = true (each batch's state goes into the changelog in the batch's transaction); set kafka.delivery = \"at_least_once\" to run without a changelog");
            }
            if !k.instance_id.is_empty() {
                if let Some(why) = topic_name_problem(&k.instance_id) {
                    bail!("kafka.instance_id {:?} {why}", k.instance_id);
                }
            }
        }
        if let Some(p) = &self.postgres {
            p.validate().map_err(anyhow::Error::msg)?;
        }
        if let Some(q) = &self.parquet {
            q.validate().map_err(anyhow::Error::msg)?;
            if self.kafka.is_none() && Path::new(&q.dir) == Path::new(&self.embedded.output_dir) {
                bail!(
                    "parquet.dir and embedded.output_dir are both {:?}; give the Parquet files their own directory",
                    q.dir
                );
            }
        }
        Ok(())
    }

    /// Journey timing rules.
    pub fn rules(&self) -> Rules {
        Rules {
            lookback_ms: self.lookback.ms(),
            view_lookback_ms: self.view_lookback.unwrap_or(self.lookback).ms(),
            expiry_ms: self.expiry.ms(),
            max_touches: self.max_touches_per_journey,
            max_age_ms: self.max_touch_age.ms(),
        }
    }

    /// Rule-model parameters.
    pub fn rule_params(&self) -> RuleParams {
        RuleParams { half_life_ms: self.half_life.ms(), u_first: self.u_shaped_first, u_last: self.u_shaped_last }
    }

    /// The models and their parameters.
    pub fn model_plan(&self) -> ModelPlan {
        ModelPlan {
            ids: self.models.clone(),
            params: self.rule_params(),
            markov_order: self.markov_order,
            max_channels: self.max_channels(),
        }
    }

    /// The channel cap of the path statistics (`max_channels`, 0: none).
    pub fn max_channels(&self) -> Option<usize> {
        (self.max_channels > 0).then_some(self.max_channels)
    }

    /// True when a data-driven model is configured.
    pub fn data_driven(&self) -> bool {
        self.models.iter().any(|m| m.is_data_driven())
    }

    /// The pseudonymization key, and whether it is the development key.
    pub fn pseudonym_key(&self) -> (Vec<u8>, bool) {
        match self.pseudonym_key.as_deref() {
            None | Some("") => (apportion_engine::pseudonym::DEVELOPMENT_KEY.to_vec(), true),
            Some(k) => (k.as_bytes().to_vec(), false),
        }
    }

    /// The data directory, if set.
    pub fn data_dir(&self) -> Option<PathBuf> {
        self.data_dir.as_deref().filter(|d| !d.is_empty()).map(PathBuf::from)
    }

    /// The bearer token of the ingest endpoint: `embedded.token`, else the
    /// contents of `embedded.token_file` without surrounding whitespace;
    /// `None` when neither is set. A token file that cannot be read or is
    /// empty is an error naming it.
    pub fn ingest_token(&self) -> Result<Option<String>> {
        read_token(&self.embedded.token, &self.embedded.token_file, "embedded", "ingest")
    }

    /// The bearer token of `POST /v1/erase` on the admin listener (Kafka
    /// mode): `admin.token`, else the contents of `admin.token_file`, as
    /// [`Config::ingest_token`] reads them.
    pub fn admin_token(&self) -> Result<Option<String>> {
        read_token(&self.admin.token, &self.admin.token_file, "admin", "admin")
    }

    /// The file to follow in embedded mode, if set.
    pub fn watch_file(&self) -> Option<PathBuf> {
        self.embedded.watch_file.as_deref().filter(|d| !d.is_empty()).map(PathBuf::from)
    }

    /// A configuration with every optional section and field present (at
    /// its default), so that every field has a name (environment variables,
    /// the documentation check).
    pub fn every_field() -> Config {
        let mut full = Config {
            data_dir: Some(String::new()),
            pseudonym_key: Some(String::new()),
            view_lookback: Some(Period::days(30)),
            kafka: Some(KafkaConfig::default()),
            postgres: Some(PostgresConfig { spool_dir: Some(String::new()), ..Default::default() }),
            parquet: Some(ParquetConfig::default()),
            ..Default::default()
        };
        full.embedded.watch_file = Some(String::new());
        full.embedded.token = Some(String::new());
        full.embedded.token_file = Some(String::new());
        full.admin.token = Some(String::new());
        full.admin.token_file = Some(String::new());
        full
    }
}

/// librdkafka properties the service sets itself, because its delivery
/// guarantees depend on them, with the reason given when a user sets one.
pub fn managed_kafka_property(key: &str) -> Option<&'static str> {
    Some(match key {
        "bootstrap.servers" => "use kafka.brokers",
        "group.id" => "use kafka.group_id",
        "enable.auto.commit" | "enable.auto.offset.store" => {
            "offsets are committed only after the output is written and the state is committed (at-least-once delivery)"
        }
        "auto.offset.reset" => "a new consumer group starts from the earliest offset, so no input is skipped",
        "enable.partition.eof" => "the consumer relies on it being off",
        "enable.idempotence" | "acks" => {
            "the producer must be idempotent with acks=all so that no output row is lost or duplicated by retries"
        }
        "isolation.level" => "the consumer's isolation level is part of the delivery guarantee",
        "transactional.id" => "it is <kafka.group_id>-<kafka.instance_id>; set kafka.instance_id",
        _ => return None,
    })
}

/// A bearer token given inline, else read from a file (surrounding
/// whitespace ignored); `section` and `what` name it in errors.
fn read_token(inline: &Option<String>, file: &Option<String>, section: &str, what: &str) -> Result<Option<String>> {
    if let Some(t) = non_empty(inline) {
        return Ok(Some(t.to_string()));
    }
    let Some(path) = non_empty(file) else { return Ok(None) };
    let text = std::fs::read_to_string(path).with_context(|| format!("cannot read {section}.token_file {path}"))?;
    let t = text.trim();
    if t.is_empty() {
        bail!("{section}.token_file {path} is empty; put the {what} token in it");
    }
    if t.contains(char::is_whitespace) {
        bail!("{section}.token_file {path} holds more than one word; a bearer token has no spaces");
    }
    Ok(Some(t.to_string()))
}

fn non_empty(v: &Option<String>) -> Option<&str> {
    v.as_deref().filter(|s| !s.is_empty())
}

fn merge(base: &mut toml::Value, over: toml::Value) {
    match (base, over) {
        (toml::Value::Table(b), toml::Value::Table(o)) => {
            for (k, v) in o {
                match b.get_mut(&k) {
                    Some(existing) if existing.is_table() && v.is_table() => merge(existing, v),
                    _ => {
                        b.insert(k, v);
                    }
                }
            }
        }
        (b, o) => *b = o,
    }
}

/// `APPORTION_*` variables of the test and development scripts, not
/// configuration fields (prefixes).
const NOT_CONFIG: [&str; 6] = [
    "APPORTION_TEST_",
    "APPORTION_REQUIRE_SERVERS",
    "APPORTION_CHECK_",
    "APPORTION_DEV_",
    "APPORTION_BIN",
    "APPORTION_LOAD_",
];

/// Applies `APPORTION_<PATH>` variables, where PATH is a field path joined by
/// `_` in capitals (e.g. `APPORTION_LOOKBACK`, `APPORTION_KAFKA_BROKERS`,
/// `APPORTION_ADMIN_LISTEN`). Lists take comma-separated values. An
/// `APPORTION_*` variable that names no field is an error, so typos are seen.
fn apply_env(value: &mut toml::Value, env: impl IntoIterator<Item = (String, String)>) -> Result<()> {
    // Every field, optional ones included (present in `every_field`), so
    // that e.g. APPORTION_POSTGRES_URL alone turns the section on.
    let mut paths: Vec<(String, Vec<String>, toml::Value)> = Vec::new();
    fn collect(prefix: &[String], v: &toml::Value, out: &mut Vec<(String, Vec<String>, toml::Value)>) {
        if let toml::Value::Table(t) = v {
            for (k, child) in t {
                let mut p = prefix.to_vec();
                p.push(k.clone());
                if child.is_table() && k != "properties" {
                    collect(&p, child, out);
                } else {
                    let name = format!("APPORTION_{}", p.join("_").to_uppercase());
                    out.push((name, p, child.clone()));
                }
            }
        }
    }
    collect(&[], &toml::Value::try_from(Config::every_field())?, &mut paths);
    for (name, raw) in env {
        if !name.starts_with("APPORTION_") || NOT_CONFIG.iter().any(|p| name.starts_with(p)) {
            continue;
        }
        let Some((_, path, template)) = paths.iter().find(|(n, _, _)| *n == name) else {
            bail!("environment variable {name} names no configuration field (see `apportion config --print-default`)");
        };
        let parsed = match template {
            toml::Value::Array(_) => toml::Value::Array(
                raw.split(',')
                    .map(str::trim)
                    .filter(|s| !s.is_empty())
                    .map(|s| toml::Value::String(s.into()))
                    .collect(),
            ),
            toml::Value::Integer(_) => toml::Value::Integer(
                raw.trim().parse().with_context(|| format!("{name} must be an integer, got {raw:?}"))?,
            ),
            toml::Value::Float(_) => {
                toml::Value::Float(raw.trim().parse().with_context(|| format!("{name} must be a number, got {raw:?}"))?)
            }
            toml::Value::Boolean(_) => toml::Value::Boolean(
                raw.trim().parse().with_context(|| format!("{name} must be true or false, got {raw:?}"))?,
            ),
            _ => toml::Value::String(raw),
        };
        let mut cur = &mut *value;
        for (i, seg) in path.iter().enumerate() {
            let table = cur.as_table_mut().expect("path goes through tables");
            if i + 1 == path.len() {
                table.insert(seg.clone(), parsed.clone());
                break;
            }
            cur = table.entry(seg.clone()).or_insert_with(|| toml::Value::Table(Default::default()));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn max_touch_age_is_at_least_the_lookback() {
        // A shorter age limit would drop touches a conversion may still
        // credit (contract: Journey rules, Touch limits; derived by hand).
        let short = Config { max_touch_age: Period::days(29), ..Config::default() };
        let err = short.validate().unwrap_err().to_string();
        assert!(err.contains("max_touch_age (29d) is shorter than lookback (30d)"), "{err}");
        assert!(Config { max_touch_age: Period::days(30), ..Config::default() }.validate().is_ok());
        assert!(Config { max_touch_age: Period(0), ..Config::default() }.validate().is_ok());
    }

    #[test]
    fn max_event_bytes_is_bounded() {
        // 0 and more than 16 MiB are refused (the file follower cuts lines
        // at 64 MiB; derived by hand from the limits in embedded/file.rs).
        for bad in [0, MAX_EVENT_BYTES_LIMIT + 1] {
            let err = Config { max_event_bytes: bad, ..Config::default() }.validate().unwrap_err();
            assert!(err.to_string().contains("max_event_bytes must be between 1 and"), "{err}");
        }
        assert!(Config { max_event_bytes: MAX_EVENT_BYTES_LIMIT, ..Config::default() }.validate().is_ok());
        assert!(MAX_EVENT_BYTES_LIMIT < crate::embedded::file::READ_LIMIT as usize);
    }

    #[test]
    fn ingest_token_sources() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("token");
        let with_file = |f: &Path| Config {
            embedded: EmbeddedConfig { token_file: Some(f.display().to_string()), ..Default::default() },
            ..Config::default()
        };
        assert_eq!(Config::default().ingest_token().unwrap(), None);
        let inline = Config {
            embedded: EmbeddedConfig { token: Some("s3cret".into()), ..Default::default() },
            ..Config::default()
        };
        assert_eq!(inline.ingest_token().unwrap().as_deref(), Some("s3cret"));
        // A file: the trailing newline of an editor or `echo` is not part of it.
        std::fs::write(&file, "s3cret\n").unwrap();
        assert_eq!(with_file(&file).ingest_token().unwrap().as_deref(), Some("s3cret"));
        std::fs::write(&file, " \n").unwrap();
        let e = with_file(&file).ingest_token().unwrap_err().to_string();
        assert!(e.contains("is empty"), "{e}");
        let missing = dir.path().join("absent");
        let e = with_file(&missing).ingest_token().unwrap_err().to_string();
        assert!(e.contains("cannot read embedded.token_file"), "{e}");
        let both = Config {
            embedded: EmbeddedConfig {
                token: Some("a".into()),
                token_file: Some(file.display().to_string()),
                ..Default::default()
            },
            ..Config::default()
        };
        assert!(both.validate().unwrap_err().to_string().contains("both set"));
        // The environment variable of the field path sets it.
        let cfg = Config::load(None, [("APPORTION_EMBEDDED_TOKEN".to_string(), "from-env".to_string())]).unwrap();
        assert_eq!(cfg.ingest_token().unwrap().as_deref(), Some("from-env"));
    }

    #[test]
    fn ingest_limits_are_checked() {
        let e = |emb: EmbeddedConfig| Config { embedded: emb, ..Config::default() }.validate();
        assert!(e(EmbeddedConfig { max_body_bytes: 0, ..Default::default() }).is_err());
        assert!(e(EmbeddedConfig { max_body_bytes: MAX_BODY_BYTES_LIMIT + 1, ..Default::default() }).is_err());
        assert!(e(EmbeddedConfig { queue_requests: 0, ..Default::default() }).is_err());
        assert_eq!(EmbeddedConfig::default().max_body_bytes, 16 * 1024 * 1024);
    }

    #[test]
    fn default_file_is_the_default_config() {
        let parsed: Config = toml::from_str(DEFAULT_CONFIG).expect("default file parses");
        assert_eq!(parsed, Config::default());
    }

    #[test]
    fn default_file_mentions_every_field() {
        let v = toml::Value::try_from(Config::every_field()).unwrap();
        fn walk(v: &toml::Value, out: &mut Vec<String>) {
            if let toml::Value::Table(t) = v {
                for (k, c) in t {
                    out.push(k.clone());
                    walk(c, out);
                }
            }
        }
        let mut keys = Vec::new();
        walk(&v, &mut keys);
        for k in keys {
            assert!(
                DEFAULT_CONFIG.contains(&format!("{k} ="))
                    || DEFAULT_CONFIG.contains(&format!("[{k}]"))
                    || DEFAULT_CONFIG.contains(&format!(".{k}]")),
                "default file does not document `{k}`"
            );
        }
    }

    #[test]
    fn file_then_env() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("c.toml");
        std::fs::write(&f, "lookback = \"7d\"\nmodels = [\"linear\"]\n[kafka]\nbrokers = \"b:1\"\n").unwrap();
        let env = vec![
            ("APPORTION_EXPIRY".to_string(), "12h".to_string()),
            ("APPORTION_MODELS".to_string(), "last_touch, linear".to_string()),
            ("APPORTION_KAFKA_GROUP_ID".to_string(), "g2".to_string()),
            ("APPORTION_CACHE_BYTES".to_string(), "1000".to_string()),
            ("HOME".to_string(), "/root".to_string()),
        ];
        let c = Config::load(Some(&f), env).unwrap();
        assert_eq!(c.lookback, Period::days(7));
        assert_eq!(c.expiry, Period(12 * 3_600_000));
        assert_eq!(c.models, vec![ModelId::LastTouch, ModelId::Linear]);
        let k = c.kafka.unwrap();
        assert_eq!(k.brokers, "b:1");
        assert_eq!(k.group_id, "g2");
        assert_eq!(c.cache_bytes, 1000);
    }

    #[test]
    fn errors_are_specific() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("c.toml");
        std::fs::write(&f, "lookbak = \"7d\"\n").unwrap();
        let e = Config::load(Some(&f), vec![]).unwrap_err().to_string();
        assert!(e.contains("lookbak"), "{e}");
        let e = Config::load(None, vec![("APPORTION_LOOKBAK".into(), "1d".into())]).unwrap_err().to_string();
        assert!(e.contains("APPORTION_LOOKBAK"), "{e}");
        let e = Config::load(None, vec![("APPORTION_LOOKBACK".into(), "1 fortnight".into())]).unwrap_err().to_string();
        assert!(e.contains("invalid duration"), "{e}");
        let e = Config::load(None, vec![("APPORTION_MODELS".into(), "linear,magic".into())]).unwrap_err().to_string();
        assert!(e.contains("magic"), "{e}");
        let e = Config::load(None, vec![("APPORTION_MODELS".into(), "linear,linear".into())]).unwrap_err().to_string();
        assert!(e.contains("listed twice"), "{e}");
        let e = Config::load(None, vec![("APPORTION_BATCH_SIZE".into(), "60000".into())]).unwrap_err().to_string();
        assert!(e.contains("max_batch_size (50000) is smaller than batch_size (60000)"), "{e}");
        for key in ["acks", "enable.idempotence", "enable.auto.offset.store", "isolation.level", "group.id"] {
            std::fs::write(&f, format!("[kafka]\n[kafka.properties]\n\"{key}\" = \"x\"\n")).unwrap();
            let e = Config::load(Some(&f), vec![]).unwrap_err().to_string();
            assert!(e.contains(key) && e.contains("cannot be set"), "{e}");
        }
    }

    /// The commented-out sections of the default file, uncommented, are the
    /// sections' defaults (so the reference shows the real values).
    #[test]
    fn optional_sections_documented_with_their_defaults() {
        for (section, want) in [
            (
                "postgres",
                toml::Value::try_from(PostgresConfig {
                    url: "postgres://apportion@127.0.0.1:5432/warehouse".into(),
                    ..Default::default()
                })
                .unwrap(),
            ),
            ("parquet", toml::Value::try_from(ParquetConfig::default()).unwrap()),
        ] {
            let header = format!("# [{section}]\n");
            let start = DEFAULT_CONFIG.find(&header).unwrap_or_else(|| panic!("no commented [{section}] section"));
            let body: String = DEFAULT_CONFIG[start + header.len()..]
                .lines()
                .take_while(|l| l.starts_with('#') && !l.starts_with("# ["))
                .filter_map(|l| l.strip_prefix("# "))
                .filter(|l| !l.starts_with("# ") && *l != "#")
                .map(|l| format!("{l}\n"))
                .collect();
            let got: toml::Value =
                toml::from_str(&body).unwrap_or_else(|e| panic!("[{section}] in the default file: {e}\n{body}"));
            assert_eq!(got, want, "[{section}] of the default file");
        }
    }

    #[test]
    fn sinks_from_env_alone() {
        let env = vec![
            ("APPORTION_POSTGRES_URL".to_string(), "postgres://u:p@db:5432/w".to_string()),
            ("APPORTION_POSTGRES_ON_UNAVAILABLE".to_string(), "continue".to_string()),
            ("APPORTION_POSTGRES_MAX_RETRIES".to_string(), "7".to_string()),
            ("APPORTION_PARQUET_ROLL_AFTER".to_string(), "5m".to_string()),
            ("APPORTION_TEST_POSTGRES".to_string(), "ignored".to_string()),
            ("APPORTION_REQUIRE_SERVERS".to_string(), "1".to_string()),
            // load/bench/replay_scale.sh
            ("APPORTION_LOAD_BIN".to_string(), "ignored".to_string()),
        ];
        let c = Config::load(None, env).unwrap();
        let p = c.postgres.expect("postgres section from the environment");
        assert_eq!(p.url, "postgres://u:p@db:5432/w");
        assert_eq!(p.on_unavailable, OnUnavailable::Continue);
        assert_eq!(p.max_retries, 7);
        assert_eq!(p.schema, "public");
        let q = c.parquet.expect("parquet section from the environment");
        assert_eq!(q.roll_after, Period(5 * 60_000));
        assert_eq!(q.dir, ParquetConfig::default().dir);
        assert_eq!(Config::load(None, vec![]).unwrap().postgres, None);
    }

    #[test]
    fn file_section_then_env() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("c.toml");
        std::fs::write(&f, "[postgres]\nurl = \"postgres://file/db\"\nschema = \"wh\"\n[parquet]\ndir = \"pq\"\n")
            .unwrap();
        let env = vec![("APPORTION_POSTGRES_URL".to_string(), "postgres://env/db".to_string())];
        let c = Config::load(Some(&f), env).unwrap();
        let p = c.postgres.unwrap();
        assert_eq!((p.url.as_str(), p.schema.as_str()), ("postgres://env/db", "wh"));
        assert_eq!(c.parquet.unwrap().dir, "pq");
    }

    #[test]
    fn sink_errors_are_specific() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("c.toml");
        let load = |text: &str| {
            std::fs::write(&f, text).unwrap();
            Config::load(Some(&f), vec![]).unwrap_err().to_string()
        };
        assert!(load("[postgres]\nschema = \"x\"\n").contains("postgres.url is empty"));
        assert!(load("[postgres]\nurl = \"postgres://h/d\"\non_unavailable = \"drop\"\n").contains("drop"));
        assert!(load("[postgres]\nurl = \"postgres://h/d\"\nshema = \"x\"\n").contains("shema"));
        assert!(load("[postgres]\nurl = \"postgres://h/d\"\ninitial_backoff = \"0s\"\n").contains("initial_backoff"));
        let long = "s".repeat(64);
        assert!(load(&format!("[postgres]\nurl = \"postgres://h/d\"\nschema = \"{long}\"\n")).contains("63 bytes"));
        assert!(load("[parquet]\ndir = \"\"\n").contains("parquet.dir is empty"));
        assert!(load("[parquet]\ndir = \"out\"\n[embedded]\noutput_dir = \"out\"\n").contains("own directory"));
    }

    /// The delivery settings: exactly once by default, refused without the
    /// changelog it commits through, and the transactional.id scheme of
    /// docs/contract.md, "Delivery" (derived by hand from it).
    #[test]
    fn delivery_defaults_to_exactly_once_and_needs_the_changelog() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("c.toml");
        let load = |text: &str| {
            std::fs::write(&f, text).unwrap();
            Config::load(Some(&f), vec![])
        };
        let k = load("[kafka]\ngroup_id = \"g\"\n").unwrap().kafka.unwrap();
        assert_eq!(k.delivery, Delivery::ExactlyOnce);
        assert_eq!(k.transactional_id("0123abcd"), "g-0123abcd");
        assert_eq!(k.repartition_transactional_id("0123abcd"), "g-0123abcd-repartition");
        let k = load("[kafka]\ngroup_id = \"g\"\ninstance_id = \"pod-2\"\n").unwrap().kafka.unwrap();
        assert_eq!(k.transactional_id("0123abcd"), "g-pod-2");
        let err = load("[kafka]\nchangelog = false\n").unwrap_err().to_string();
        assert!(err.contains("needs kafka.changelog = true") && err.contains("at_least_once"), "{err}");
        let k = load("[kafka]\nchangelog = false\ndelivery = \"at_least_once\"\n").unwrap().kafka.unwrap();
        assert_eq!(k.delivery, Delivery::AtLeastOnce);
        assert!(load("[kafka]\ninstance_id = \"a b\"\n").unwrap_err().to_string().contains("kafka.instance_id"));
        assert!(load("[kafka]\ndelivery = \"twice\"\n").unwrap_err().to_string().contains("twice"));
        let err = load("[kafka.properties]\n\"transactional.id\" = \"x\"\n").unwrap_err().to_string();
        assert!(err.contains("kafka.instance_id"), "{err}");
    }
}
