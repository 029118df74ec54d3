//! The synthetic stream the cycle benchmarks share: 12 columns (two
//! categories, nine numbers, the target `y`), where `y` is a fixed
//! nonlinear function of the inputs plus noise. Row `i` depends only on the
//! seed and `i`, so any range of rows can be written on its own and a
//! store grown file by file holds the same rows as one written at once.

use std::io::Write;
use std::path::Path;

use tidegate::rng::Rng;

pub const HEADER: &str = "site,kind,x0,x1,x2,x3,x4,x5,x6,x7,x8,y";
const SITES: usize = 12;
const KINDS: usize = 4;

/// The benchmark's config: the columns above, large files allowed, and
/// any extra TOML (sections and keys) appended.
pub fn config_text(extra: &str) -> String {
    let mut t = String::from(
        "[data]\ntarget = \"y\"\ntask = \"regression\"\nmax_file_bytes = 4294967296\n\n",
    );
    for c in ["site", "kind"] {
        t.push_str(&format!(
            "[[data.columns]]\nname = \"{c}\"\nkind = \"category\"\n\n"
        ));
    }
    for i in 0..9 {
        t.push_str(&format!(
            "[[data.columns]]\nname = \"x{i}\"\nkind = \"number\"\n\n"
        ));
    }
    t.push_str("[[data.columns]]\nname = \"y\"\nkind = \"number\"\n\n");
    t.push_str(extra);
    t
}

/// One row's cells as CSV text (no line end).
fn row(seed: u64, i: u64, out: &mut String) {
    let mut rng = Rng::new(seed ^ i.wrapping_mul(0xD134_2543_DE82_EF95));
    let site = rng.below(SITES);
    let kind = rng.below(KINDS);
    let x: Vec<f64> = (0..9).map(|_| rng.normal()).collect();
    let site_effect = (site as f64 * 0.7).sin();
    let kind_slope = [0.5, -0.3, 0.1, 0.8][kind];
    let y = x[0].sin() + x[1] * x[2] - 0.5 * x[3]
        + 0.3 * x[4].abs()
        + 0.6 * (x[5] * x[6]).tanh()
        + kind_slope * x[7]
        + 0.2 * x[8] * x[8]
        + site_effect
        + 0.1 * rng.normal();
    use std::fmt::Write as _;
    let _ = write!(out, "s{site},k{kind}");
    for v in &x {
        let _ = write!(out, ",{v:.4}");
    }
    let _ = write!(out, ",{y:.4}");
}

/// Writes rows `start..start + n` to a CSV file at `path`.
pub fn write_csv(path: &Path, seed: u64, start: u64, n: u64) -> std::io::Result<()> {
    let mut w = std::io::BufWriter::with_capacity(1 << 20, std::fs::File::create(path)?);
    writeln!(w, "{HEADER}")?;
    let mut line = String::with_capacity(128);
    for i in start..start + n {
        line.clear();
        row(seed, i, &mut line);
        line.push('\n');
        w.write_all(line.as_bytes())?;
    }
    w.flush()
}
