//! `tidegate onnx`: write a model version (the serving one by default) as
//! an ONNX file, with its manifest `<FILE>.json` beside it. Reads only the
//! config, `serving` and `models/`, so it works while another process owns
//! the state dir; it records nothing in the audit log (the export that
//! follows the gate, `[export] path`, does).

use std::path::PathBuf;

use super::{Cli, Exit, emit};
use crate::ids::ModelId;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Model version to export (default: the serving model).
    #[arg(long, value_name = "ID")]
    model: Option<ModelId>,
    /// The ONNX file to write (replaced atomically); the manifest goes to FILE.json.
    #[arg(long, value_name = "FILE")]
    output: PathBuf,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    let id = match args.model {
        Some(id) => id,
        None => match super::predict::serving_model(state)? {
            Some(id) => id,
            None => anyhow::bail!(
                "no model serves in {} yet; train one first, or name one with --model",
                state.root().display()
            ),
        },
    };
    let started = std::time::Instant::now();
    let manifest = crate::export::export_to(state, &config, id, &args.output)?;
    let ms = started.elapsed().as_secs_f64() * 1e3;
    let text = if cli.json {
        format!("{}\n", serde_json::to_string(&manifest)?)
    } else {
        let ports = |ps: &[crate::export::Port]| {
            ps.iter()
                .map(|p| format!("{} [{}] {}", p.name, p.shape.join(", "), p.dtype))
                .collect::<Vec<_>>()
                .join("; ")
        };
        format!(
            "model {id} written to {} ({} bytes, ONNX opset {}, blake3 {}) in {ms:.1} ms\n  inputs: {}\n  outputs: {}\n  manifest: {}\n",
            args.output.display(),
            manifest.onnx_bytes,
            manifest.opset,
            manifest.onnx_blake3,
            ports(&manifest.inputs),
            ports(&manifest.outputs),
            crate::export::manifest_path(&args.output).display()
        )
    };
    emit(&text)?;
    Ok(Exit::Ok)
}
