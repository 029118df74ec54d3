//! The integration suite: one test binary (so the build stays fast) that
//! drives the real library and the real `tidegate` binary on temp dirs.

mod backup;
mod crash;
mod daemon;
mod demo;
mod endpoint;
mod faults;
mod former_names;
mod holes;
mod ingest;
mod lifecycle;
mod migrate;
mod onnx;
mod openmetrics;
mod paths;
mod perms;
mod powerloss;
mod report;
mod rowfiles;
mod screens;
mod streaming;
mod support;
mod suspect;
mod tamper;
mod training;
mod trees;
mod wine_stream;
