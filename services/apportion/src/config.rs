//! Typed configuration: defaults, then the TOML file, then `APPORTION_*`
//! environment variables, then command-line flags.
//!
//! Every field is documented in [`DEFAULT_CONFIG`], the file printed by
//! `apportion config --print-default`; a test checks that this file parses to
//! exactly [`Config::default`] and mentions every field, so the reference
//! cannot drift from the structs.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use apportion_engine::journey::Rules;
use apportion_engine::registry::{check_params, parse_model_list, RuleParams};
use apportion_engine::Span;
use serde::{Deserialize, Serialize};

/// The documented default configuration file.
pub const DEFAULT_CONFIG: &str = include_str!("default_config.toml");

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
    /// Where sled keeps state. Empty: a temporary directory (replay) or `./apportion-data` (serve).
    pub data_dir: String,
    /// Models to run, in output order.
    pub models: Vec<String>,
    /// Lookback window for clicks.
    pub lookback: Span,
    /// Lookback window for views; empty means the same as `lookback`.
    pub view_lookback: Option<Span>,
    /// A journey closes as non-converting when last touch + expiry < watermark.
    pub expiry: Span,
    /// Half-life of `time_decay`.
    pub half_life: Span,
    /// `u_shaped` weight of the first touch (paths of 3 or more).
    pub u_shaped_first: f64,
    /// `u_shaped` weight of the last touch (paths of 3 or more).
    pub u_shaped_last: f64,
    /// Order of the `markov` chain (1 to 4).
    pub markov_order: usize,
    /// Secret key for pseudonymization (prefer the environment variable).
    pub pseudonym_key: String,
    /// Largest accepted event, in bytes.
    pub max_event_bytes: usize,
    /// Memory budget of the journey cache, in bytes.
    pub cache_bytes: usize,
    /// Streaming: how late an event may be and still count.
    pub allowed_lateness: Span,
    /// Streaming: what to do with events later than that.
    pub late_policy: LatePolicy,
    /// Streaming: after this long without input, the watermark advances by processing time.
    pub idle_timeout: Span,
    /// Streaming: how often the data-driven models are refitted.
    pub refit_interval: Span,
    /// Streaming: how long event ids are remembered for duplicate detection (event time).
    pub dedupe_horizon: Span,
    /// Streaming: largest number of events in one processing batch.
    pub batch_size: usize,
    /// Streaming: shutdown grace period.
    pub shutdown_grace: Span,
    /// Admin HTTP listener.
    pub admin: AdminConfig,
    /// Embedded mode (no Kafka): HTTP ingest and files.
    pub embedded: EmbeddedConfig,
    /// Kafka source and sinks; absent means embedded mode.
    pub kafka: Option<KafkaConfig>,
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
}

/// Embedded mode.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct EmbeddedConfig {
    /// Address of the ingest endpoint (POST /v1/events); empty disables it.
    pub http_listen: String,
    /// An NDJSON file to follow; empty disables it.
    pub watch_file: String,
    /// Directory of the rotating output files.
    pub output_dir: String,
    /// Rotate an output file after this many bytes.
    pub rotate_bytes: u64,
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
    /// Payload format of the output topics.
    pub output_format: Format,
    /// False: input is not keyed by user; events are first re-keyed through `repartition_topic`.
    pub input_keyed_by_user: bool,
    /// Internal topic keyed by user key (used when `input_keyed_by_user = false`).
    pub repartition_topic: String,
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
            data_dir: String::new(),
            models: ["last_touch", "first_touch", "linear", "time_decay", "u_shaped"].map(String::from).to_vec(),
            lookback: Span::days(30),
            view_lookback: None,
            expiry: Span::days(30),
            half_life: Span::days(7),
            u_shaped_first: 0.4,
            u_shaped_last: 0.4,
            markov_order: 1,
            pseudonym_key: String::new(),
            max_event_bytes: apportion_engine::event::DEFAULT_MAX_EVENT_BYTES,
            cache_bytes: 256 << 20,
            allowed_lateness: Span::seconds(5),
            late_policy: LatePolicy::DeadLetter,
            idle_timeout: Span::seconds(60),
            refit_interval: Span(15 * 60_000),
            dedupe_horizon: Span::days(7),
            batch_size: 5000,
            shutdown_grace: Span::seconds(30),
            admin: AdminConfig::default(),
            embedded: EmbeddedConfig::default(),
            kafka: None,
            log: LogConfig::default(),
        }
    }
}

impl Default for AdminConfig {
    fn default() -> Self {
        AdminConfig { listen: "127.0.0.1:9464".into(), max_ready_lag: 0 }
    }
}

impl Default for EmbeddedConfig {
    fn default() -> Self {
        EmbeddedConfig {
            http_listen: "127.0.0.1:9465".into(),
            watch_file: String::new(),
            output_dir: "apportion-out".into(),
            rotate_bytes: 64 << 20,
        }
    }
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
            output_format: Format::Json,
            input_keyed_by_user: true,
            repartition_topic: "apportion-repartition".into(),
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
            let text = std::fs::read_to_string(path)
                .with_context(|| format!("cannot read config file {}", path.display()))?;
            let file_value: toml::Value =
                toml::from_str(&text).with_context(|| format!("config file {} is not valid TOML", path.display()))?;
            merge(&mut value, file_value);
        }
        apply_env(&mut value, env)?;
        let cfg: Config = value.try_into().map_err(|e: toml::de::Error| {
            anyhow::anyhow!("invalid configuration{}: {}", file.map(|p| format!(" in {}", p.display())).unwrap_or_default(), e.message())
        })?;
        cfg.validate()?;
        Ok(cfg)
    }

    /// Checks values that types alone do not.
    pub fn validate(&self) -> Result<()> {
        parse_model_list(&self.models.join(","))?;
        check_params(&self.rule_params())?;
        if self.lookback.ms() <= 0 || self.expiry.ms() <= 0 {
            bail!("lookback and expiry must be greater than 0");
        }
        if !(1..=4).contains(&self.markov_order) {
            bail!("markov_order must be 1, 2, 3 or 4, got {}", self.markov_order);
        }
        if self.batch_size == 0 {
            bail!("batch_size must be at least 1");
        }
        if let Some(k) = &self.kafka {
            if k.input_topics.is_empty() {
                bail!("kafka.input_topics must list at least one topic");
            }
            for (name, key) in k.properties.iter().map(|(k, _)| (k, k)) {
                if matches!(key.as_str(), "enable.auto.commit" | "group.id" | "bootstrap.servers") {
                    bail!("kafka.properties.{name} is managed by apportion; use the dedicated setting instead");
                }
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
        }
    }

    /// Rule-model parameters.
    pub fn rule_params(&self) -> RuleParams {
        RuleParams { half_life_ms: self.half_life.ms(), u_first: self.u_shaped_first, u_last: self.u_shaped_last }
    }

    /// The pseudonymization key, and whether it is the development key.
    pub fn pseudonym_key(&self) -> (Vec<u8>, bool) {
        if self.pseudonym_key.is_empty() {
            (apportion_engine::pseudonym::DEVELOPMENT_KEY.to_vec(), true)
        } else {
            (self.pseudonym_key.as_bytes().to_vec(), false)
        }
    }

    /// The data directory, if set.
    pub fn data_dir(&self) -> Option<PathBuf> {
        (!self.data_dir.is_empty()).then(|| PathBuf::from(&self.data_dir))
    }
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

/// Applies `APPORTION_<PATH>` variables, where PATH is a field path joined by
/// `_` in capitals (e.g. `APPORTION_LOOKBACK`, `APPORTION_KAFKA_BROKERS`,
/// `APPORTION_ADMIN_LISTEN`). Lists take comma-separated values. An
/// `APPORTION_*` variable that names no field is an error, so typos are seen.
fn apply_env(value: &mut toml::Value, env: impl IntoIterator<Item = (String, String)>) -> Result<()> {
    let kafka_defaults = toml::Value::try_from(KafkaConfig::default())?;
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
    collect(&[], value, &mut paths);
    let mut kafka_paths = Vec::new();
    collect(&["kafka".to_string()], &kafka_defaults, &mut kafka_paths);
    paths.extend(kafka_paths);
    // Optional fields absent from the serialized defaults.
    paths.push(("APPORTION_VIEW_LOOKBACK".into(), vec!["view_lookback".into()], toml::Value::String(String::new())));
    for (name, raw) in env {
        if !name.starts_with("APPORTION_") || name.starts_with("APPORTION_TEST_") {
            continue;
        }
        let Some((_, path, template)) = paths.iter().find(|(n, _, _)| *n == name) else {
            bail!("environment variable {name} names no configuration field (see `apportion config --print-default`)");
        };
        let parsed = match template {
            toml::Value::Array(_) => toml::Value::Array(
                raw.split(',').map(str::trim).filter(|s| !s.is_empty()).map(|s| toml::Value::String(s.into())).collect(),
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
    fn default_file_is_the_default_config() {
        let parsed: Config = toml::from_str(DEFAULT_CONFIG).expect("default file parses");
        assert_eq!(parsed, Config::default());
    }

    #[test]
    fn default_file_mentions_every_field() {
        let mut full = Config::default();
        full.kafka = Some(KafkaConfig::default());
        full.view_lookback = Some(Span::days(30));
        let v = toml::Value::try_from(full).unwrap();
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
            assert!(DEFAULT_CONFIG.contains(&format!("{k} =")) || DEFAULT_CONFIG.contains(&format!("[{k}]")) || DEFAULT_CONFIG.contains(&format!(".{k}]")), "default file does not document `{k}`");
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
        assert_eq!(c.lookback, Span::days(7));
        assert_eq!(c.expiry, Span(12 * 3_600_000));
        assert_eq!(c.models, vec!["last_touch", "linear"]);
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
    }
}
