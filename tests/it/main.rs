//! The integration suite: one test binary (so the build stays fast) that
//! drives the real library and the real `tidegate` binary on temp dirs.

mod crash;
mod ingest;
mod lifecycle;
mod report;
mod support;
mod tamper;
mod training;
