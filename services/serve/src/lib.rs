//! # apportion-serve
//!
//! The streaming core of apportion, as a library: configuration, the
//! processing pipeline, the sources (Kafka, HTTP, a followed file, memory),
//! the wiring of the sinks, the processing loop, metrics and the admin
//! endpoints, and the file driver of `apportion replay`. The `apportion`
//! binary only parses arguments and calls in here, so everything below can
//! be tested without a process: the pipeline's unit tests run on a
//! [`source::MemorySource`] and an in-memory sink.
//!
//! ## Layout
//! - [`config`] (+ `default_config.toml`): typed configuration, file and
//!   environment.
//! - [`source`]: the [`source::Source`] trait, partitions and messages,
//!   [`source::MemorySource`].
//! - [`pipeline`]: partitions, watermarks, duplicates and late events,
//!   credit (split by concern in its submodules).
//! - [`refit`]: the model snapshot and its refit schedule.
//! - [`run_loop`]: poll, process, write sinks, commit, acknowledge.
//! - [`service`]: start-up and shutdown of `serve`.
//! - [`kafka`]: consumer source, producer sink, repartition stage.
//! - [`embedded`]: HTTP ingest and the followed file.
//! - [`admin`]: `/metrics`, `/healthz`, `/readyz`, `/v1/models`.
//! - [`auth`]: the bearer-token check of ingest and state-changing endpoints.
//! - [`metrics`]: every metric (spec: docs/telemetry.md).
//! - [`replay_file`], [`output`]: `replay` over a file, atomic output files.
//! - [`state_admin`]: `apportion state` (show the store, reset a watermark).
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod admin;
pub mod auth;
pub mod config;
pub mod embedded;
pub mod erase_request;
pub mod kafka;
pub mod metrics;
pub mod output;
pub mod pipeline;
pub mod refit;
pub mod replay_file;
pub mod run_loop;
pub mod service;
pub mod source;
pub mod state_admin;
mod state_scan;

#[cfg(test)]
mod tests;
