//! Integration tests: the real service on a free loopback port, spoken to over HTTP, and the
//! real binary for the command line.

mod access;
mod adverse_impact;
mod cli;
mod contract;
mod control;
mod crash;
mod dashboard;
mod demo;
mod faults;
mod helpers;
mod hostile;
mod kubernetes;
mod labels;
mod limits;
mod metrics;
/// The throwaway PostgreSQL of the unit tests, shared by path (it uses nothing of the crate).
#[path = "../../src/store/pg_store/testdb.rs"]
mod pg_testdb;
mod pmml;
mod postgres;
mod remote_cli;
mod replicas;
mod retention;
mod scoring;
mod shadow;
mod share;
mod short_config;
mod sign_off;
mod store_copy;
