//! tidegate: keeps a neural-network model on growing tabular data up to date.
//!
//! The data path runs one way (see DEVELOPERS.md): `ingest` turns a CSV file
//! into an encoded batch, `store` commits it with its audit entry in one
//! transaction, `audit` mirrors the hash-chained log to `audit.jsonl`.
//! The `cli` module holds one file per command; `main.rs` only maps errors
//! to exit codes.

pub mod aside;
pub mod audit;
pub mod backup;
pub mod baseline;
pub mod cli;
pub mod config;
pub mod cycle;
pub mod daemon;
pub mod demo;
pub mod drift;
pub mod endpoint;
pub mod export;
pub mod failpoint;
pub mod fresh;
pub mod fsutil;
pub mod gate;
pub mod ids;
pub mod ingest;
pub mod intake;
pub mod lifecycle;
pub mod model;
pub mod provenance;
pub mod records;
pub mod refold;
pub mod report;
pub mod rng;
pub mod rowfile;
pub mod sample;
pub mod schema;
pub mod scoring;
pub mod sim;
pub mod state;
pub mod store;
pub mod suspect;
pub mod train;
pub mod trees;
pub mod verify;
