//! `bench_train` with mimalloc as the global allocator, to compare against
//! glibc malloc (with and without its MALLOC_* tuning variables).
//!
//! Run: `cargo run --release --example bench_train_mimalloc [-- EPOCHS [ROWS]]`

#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

#[path = "bench_train.rs"]
mod bench;

fn main() {
    bench::main();
}
