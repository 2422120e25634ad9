//! `understudy`: a self-hosted scoring service that retrains a penalized challenger behind
//! cross-validation and promotes it only when it beats the incumbent on later, held-out data.
//!
//! The crate is a library with a thin binary on top (`src/main.rs`). See `DEVELOPERS.md` for the
//! map of modules and the invariants that keep them apart.
//!
//! Items are `pub` only where `main.rs`, the integration tests or the benches use them;
//! everything else is `pub(crate)` (the `unreachable_pub` lint below keeps it so).

#![warn(unreachable_pub)]

pub mod access;
pub mod adverse_impact;
pub mod api;
pub mod app;
pub mod backtest;
pub mod cli;
pub(crate) mod client;
pub mod config;
pub mod decline;
pub mod demo;
pub mod drift;
pub mod evidence;
pub(crate) mod guess;
pub(crate) mod ingest;
pub mod learn;
pub mod metrics;
pub mod model;
pub mod monitor;
pub mod offline;
pub mod promotion;
pub mod registry;
pub(crate) mod render;
pub mod reproduce;
pub mod scheduler;
pub mod schema;
pub mod store;
pub mod telemetry;
pub(crate) mod text;
pub(crate) mod threads;
pub mod time;
pub mod two_sample;
