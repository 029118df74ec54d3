//! Writes the bakery demo's nightly files into `demo-data/` (or the folder
//! given as the first argument). The data is invented; see demo-data/README.md.

fn main() -> std::io::Result<()> {
    let dir = std::env::args().nth(1).unwrap_or_else(|| "demo-data".into());
    std::fs::create_dir_all(&dir)?;
    for (name, text) in tidegate::demo::files(tidegate::demo::SEED) {
        std::fs::write(std::path::Path::new(&dir).join(&name), text)?;
        println!("wrote {dir}/{name}");
    }
    Ok(())
}
