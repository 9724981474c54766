//! Kafka: the consumer source, the producer sink and the repartition stage
//! (rdkafka over librdkafka built from its vendored source).
//!
//! The consumer never auto-commits: offsets are committed to the group only
//! after the batch's output is delivered and the state is committed (with
//! exactly-once delivery, the state's changelog records, the input offset
//! among them, commit in the batch's transaction with the output);
//! on assignment, offsets already applied according to the store are
//! skipped, so the store is the authority and the group's offsets a
//! fallback.
//!
//! - [`source`]: [`KafkaSource`], the consumer (and the repartition stage
//!   when the input is not keyed by user).
//! - [`sink`]: [`KafkaSink`], credit rows, paths and dead letters to topics.
//! - [`repartition`]: stage 1 for input not keyed by user.
//! - [`changelog`]: [`changelog::KafkaChangelog`], each partition's state
//!   published to a compacted topic and restored from it on another instance.
//! - [`txn`]: [`txn::Txn`], the instance's transactional producer
//!   (`kafka.delivery = "exactly_once"`): per batch, output and changelog
//!   records in one Kafka transaction.
//! - [`encode`]: JSON or protobuf payloads of the output topics.
//! - [`erase`]: `POST /v1/erase` in Kafka mode, an erase to every input partition.
//! - [`path_stats`]: path statistics shared by the instances of a group
//!   (`<group_id>-path-stats`), so that all fit the same data-driven models.

pub mod changelog;
pub mod encode;
pub mod erase;
pub mod path_stats;
pub mod repartition;
pub mod sink;
pub mod source;
pub mod txn;

use anyhow::{Context, Result};
use rdkafka::config::ClientConfig;
use rdkafka::consumer::BaseConsumer;

use crate::config::KafkaConfig;

pub use sink::KafkaSink;
pub use source::KafkaSource;

/// The client configuration every client starts from: the brokers, then the
/// user's `[kafka.properties]` (TLS, SASL, tuning). Settings each client
/// needs for its guarantees are set after these, by the client's own
/// function, so they win.
fn base_config(k: &KafkaConfig) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &k.brokers);
    for (key, v) in &k.properties {
        c.set(key, v);
    }
    c
}

/// Producer configuration every producer starts from: idempotent, acks
/// from every in-sync replica, and (unless `[kafka.properties]` sets it) a
/// 5 ms linger so that rows of a batch travel together.
fn producer_config(k: &KafkaConfig) -> ClientConfig {
    let mut c = base_config(k);
    c.set("enable.idempotence", "true").set("acks", "all");
    if !k.properties.contains_key("linger.ms") {
        c.set("linger.ms", "5");
    }
    c
}

/// Consumer configuration: manual offsets, start from the earliest offset
/// for a new group, and (unless `[kafka.properties]` names another)
/// cooperative-sticky assignment: a rebalance moves only the partitions that
/// change owner, the others keep working and keep their state in memory.
pub fn consumer_config(k: &KafkaConfig, group: &str) -> ClientConfig {
    let mut c = base_config(k);
    c.set("group.id", group)
        .set("enable.auto.commit", "false")
        .set("enable.auto.offset.store", "false")
        .set("auto.offset.reset", "earliest")
        .set("enable.partition.eof", "false");
    if !k.properties.contains_key("partition.assignment.strategy") {
        c.set("partition.assignment.strategy", "cooperative-sticky");
    }
    c
}

/// Where a reader of `parts` in `consumer`'s group starts: each partition's
/// committed offset, else its beginning (`auto.offset.reset = earliest`,
/// [`consumer_config`]). Read-committed, the answer waits while a
/// transaction holds a pending offset for a partition (KIP-447).
pub(crate) fn group_starts<C: rdkafka::consumer::ConsumerContext>(
    consumer: &BaseConsumer<C>,
    parts: rdkafka::TopicPartitionList,
    timeout: std::time::Duration,
) -> rdkafka::error::KafkaResult<Vec<(String, i32, rdkafka::Offset)>> {
    use rdkafka::consumer::Consumer;
    let committed = consumer.committed_offsets(parts, timeout)?;
    Ok(committed
        .elements()
        .iter()
        .map(|e| {
            let to = match e.offset() {
                rdkafka::Offset::Offset(o) => rdkafka::Offset::Offset(o),
                _ => rdkafka::Offset::Beginning,
            };
            (e.topic().to_string(), e.partition(), to)
        })
        .collect())
}

/// A client that only asks the brokers where partitions begin and end
/// (`fetch_watermarks`), for the lag and caught-up readings. A group
/// consumer's own query waits on its broker connection behind the fetch in
/// flight (a long poll of up to `fetch.wait.max.ms` when caught up), so a
/// reading of four partitions cost the processing loop up to two seconds;
/// this client has no fetch in flight. Read-committed like the consumers:
/// the end it reports is the last stable offset. It never joins `group`
/// (librdkafka wants a group id for a consumer).
pub fn offsets_probe(k: &KafkaConfig, group: &str) -> Result<BaseConsumer> {
    base_config(k)
        .set("group.id", group)
        .set("enable.auto.commit", "false")
        .set("isolation.level", "read_committed")
        .create()
        .context("creating the Kafka offsets client")
}

/// Creates the compacted topic `name` (`partitions` partitions,
/// `kafka.changelog_replication_factor` replicas) unless it exists; `what`
/// names it in messages, `hint` says what to do when it cannot be created;
/// `settings` are further topic configs.
pub(crate) fn create_compacted_topic(
    k: &KafkaConfig,
    name: &str,
    partitions: i32,
    settings: &[(&str, &str)],
    what: &str,
    hint: &str,
) -> Result<()> {
    use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
    use rdkafka::client::DefaultClientContext;
    use rdkafka::types::RDKafkaErrorCode;
    let admin: AdminClient<DefaultClientContext> =
        base_config(k).create().context("creating the Kafka admin client")?;
    let mut topic = NewTopic::new(name, partitions, TopicReplication::Fixed(k.changelog_replication_factor))
        .set("cleanup.policy", "compact");
    for (key, v) in settings {
        topic = topic.set(key, v);
    }
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
    let opts = AdminOptions::new().operation_timeout(Some(std::time::Duration::from_secs(30)));
    let results = rt.block_on(admin.create_topics([&topic], &opts)).with_context(|| format!("creating the {what}"))?;
    for r in results {
        match r {
            Ok(_) => tracing::info!(topic = %name, partitions, "{what} created"),
            Err((_, RDKafkaErrorCode::TopicAlreadyExists)) => {}
            Err((_, code)) => anyhow::bail!("cannot create the {what} {name}: {code}; {hint}"),
        }
    }
    Ok(())
}
