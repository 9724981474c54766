//! Tests of the comparison against things outside it: hand-worked shift
//! matrices, the ground-truth simulator of `apportion-load` (known channel
//! effects, known lift), the engine's own replay, and the Parquet sink's
//! files. One test binary, one module per concern.

mod bootstrap;
mod formats;
mod lift;
mod shift;
mod support;
