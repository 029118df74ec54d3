//! Writes the cycle benchmarks' synthetic stream (examples/common/stream.rs)
//! for scripts such as ops/bench/scaling.sh.
//!
//! Run: `cargo run --release --example gen_stream -- csv OUT START N`
//! (rows START..START+N to the CSV file OUT) or
//! `cargo run --release --example gen_stream -- config [EXTRA_TOML]` (the
//! stream's config on stdout, EXTRA_TOML appended; `\n` in it is a line end).

#[path = "common/stream.rs"]
mod stream;

/// The seed every script run uses, so sizes differ only in row count.
const SEED: u64 = 20_261_202;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.iter().map(String::as_str).collect::<Vec<_>>()[..] {
        ["csv", out, start, n] => {
            stream::write_csv(std::path::Path::new(out), SEED, start.parse()?, n.parse()?)?;
        }
        ["config"] => print!("{}", stream::config_text("")),
        ["config", extra] => print!("{}", stream::config_text(&extra.replace("\\n", "\n"))),
        _ => anyhow::bail!("usage: gen_stream csv OUT START N | gen_stream config [EXTRA_TOML]"),
    }
    Ok(())
}
