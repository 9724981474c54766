//! End-to-end tests: the `apportion` binary against a real Apache Kafka
//! broker (deploy/dev/kafka.sh), a real PostgreSQL (deploy/dev/postgres.sh),
//! the embedded HTTP mode, the metrics exposition checked by Prometheus'
//! own promtool, and malformed or hostile input through `replay`. All
//! compile as one binary.

mod embedded;
mod hostile_input;
mod kafka_stream;
mod metrics_lint;
mod no_raw_ids;
mod output_pin;
mod report_browser;
mod scale_out;
mod warehouse;
