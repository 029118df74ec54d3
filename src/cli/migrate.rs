//! `tidegate --config NEW.toml migrate --reason TEXT`: take a config whose
//! columns changed. Every stored row is rewritten for the new schema in one
//! store transaction with its audit entry; the serving model (trained on the
//! old columns) stops serving and the next `retrain` trains a cold
//! candidate, judged against the trivial predictor like a first model.

use anyhow::Context;

use super::{Cli, Exit, emit};
use crate::audit::Event;
use crate::config::Config;
use crate::schema::{Schema, plan_migration};
use crate::state::{self, StateDir};
use crate::store::StoreError;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Why the columns changed (goes into the audit log).
    #[arg(long, value_name = "TEXT")]
    reason: String,
    /// Show what would change and stop.
    #[arg(long)]
    dry_run: bool,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let Some(new_path) = &cli.config else {
        anyhow::bail!(
            "migrate needs the new config: tidegate --config NEW.toml migrate --reason TEXT"
        );
    };
    if args.reason.trim().is_empty() {
        anyhow::bail!("a reason is required (--reason TEXT): it goes into the audit log");
    }
    let text = std::fs::read_to_string(new_path)
        .with_context(|| format!("cannot read config {}", new_path.display()))?;
    let new_config = Config::parse(&text, new_path)?;
    if !state.is_initialised() {
        return Err(StoreError::NotInitialised {
            path: state.root().to_path_buf(),
        }
        .into());
    }
    let old_config = Config::load(&state.config())?;
    let new_fp = new_config.schema_fingerprint();
    let write_copy = || {
        crate::fsutil::write_atomic(&state.config(), text.as_bytes())
            .with_context(|| format!("cannot write {}", state.config().display()))
    };
    if old_config.schema_fingerprint() == new_fp {
        emit("the columns are unchanged: nothing to migrate\n")?;
        return Ok(Exit::Ok);
    }
    // A migration interrupted after its store transaction: the store is
    // already on the new schema; only the config copy is missing.
    match state::open(state, &new_config) {
        Ok(_) => {
            write_copy()?;
            emit("the store was already migrated; the config copy is now updated\n")?;
            return Ok(Exit::Ok);
        }
        Err(state::StateError::Store(StoreError::SchemaChanged { .. })) => {}
        Err(e) => return Err(e.into()),
    }
    let (mut owner, _) = state::open(state, &old_config)?;
    let old_schema = owner.store.schema().clone();
    let new_schema = Schema::from_config(&new_config);
    let plan = match plan_migration(&old_schema, &new_schema) {
        Ok(p) => p,
        Err(why) => {
            tracing::error!("cannot migrate to {}: {why}", new_path.display());
            return Ok(Exit::BadConfig);
        }
    };
    let previous_serving = owner.store.serving()?;
    let summary = format!(
        "added: {}; removed: {}; changed: {}; {} rows in {} batches rewritten",
        plan.added.join(", "),
        plan.removed.join(", "),
        plan.changed.join(", "),
        owner.store.totals().train_rows + owner.store.totals().holdout_rows,
        owner.store.totals().batches
    );
    if args.dry_run {
        emit(&format!("dry run, nothing changed: {summary}\n"))?;
        return Ok(Exit::Ok);
    }
    let event = Event::SchemaMigrated {
        from_fingerprint: old_config.schema_fingerprint(),
        to_fingerprint: new_fp.clone(),
        added: plan.added.clone(),
        removed: plan.removed.clone(),
        changed: plan.changed.clone(),
        previous_serving,
        config_hash: blake3::hash(text.as_bytes()).to_hex().to_string(),
        reason: args.reason.trim().to_string(),
    };
    let entries = owner.store.migrate(
        &new_schema,
        &new_fp,
        &plan,
        event,
        &state::current_user(),
        chrono::Utc::now(),
    )?;
    let lines: Vec<String> = entries.iter().map(|e| e.line()).collect();
    owner
        .mirror
        .append(&lines.iter().map(|l| l.as_bytes()).collect::<Vec<_>>())?;
    let entry = &entries[0];
    write_copy()?;
    if state.serving().exists() {
        std::fs::remove_file(state.serving())
            .with_context(|| format!("cannot remove {}", state.serving().display()))?;
    }
    let text = if cli.json {
        format!("{}\n", entry.line())
    } else {
        format!(
            "migrated: {summary}\nno model serves now; run `tidegate retrain` to train a cold candidate on the new columns\n"
        )
    };
    emit(&text)?;
    Ok(Exit::Ok)
}
