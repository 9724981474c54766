//! Warehouse sinks against real readers and a real server: Parquet files
//! read back with the `parquet` crate and with DuckDB, PostgreSQL tables
//! checked in SQL. Rows come from the engine run on a small hand-written
//! scenario (`rows.rs`); the checks use only the contract's own invariants
//! (every conversion's credit sums to 1 per model, docs/contract.md "Credit rows")
//! and compare each store with the rows that went in.

mod duckdb_reader;
mod parquet_sink;
mod postgres_sink;
mod rows;
