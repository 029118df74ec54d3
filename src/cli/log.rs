//! `tidegate log`: query the audit log. Reads `audit.jsonl` only, so it
//! works while another process owns the state dir.

use super::{Cli, Exit, emit};
use crate::audit::{self, Event, Filter};
use crate::ids::BatchId;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Only entries at or after this time: RFC 3339, a date, or a span back (7d, 12h).
    #[arg(long, value_name = "WHEN")]
    since: Option<String>,
    /// Only entries at or before this time (same forms as --since).
    #[arg(long, value_name = "WHEN")]
    until: Option<String>,
    /// Only these kinds, comma-separated (e.g. batch-accepted,batch-refused).
    #[arg(long, value_name = "KINDS", value_delimiter = ',')]
    kind: Vec<String>,
    /// Only entries about this batch.
    #[arg(long, value_name = "ID")]
    batch: Option<BatchId>,
    /// Only entries about this model version.
    #[arg(long, value_name = "ID")]
    model: Option<crate::ids::ModelId>,
    /// Only the newest N matching entries.
    #[arg(long, value_name = "N")]
    limit: Option<usize>,
    /// With --batch: also the entries of every model that saw the batch
    /// (directly or through its parents); with --model: also the entries
    /// of every batch the model saw. Says which, above the entries.
    #[arg(long)]
    lineage: bool,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let now = chrono::Utc::now();
    let when = |s: &Option<String>| s.as_deref().map(|s| audit::parse_when(s, now)).transpose();
    let (since, until) = match (when(&args.since), when(&args.until)) {
        (Ok(a), Ok(b)) => (a, b),
        (Err(e), _) | (_, Err(e)) => {
            eprintln!("error: {e}");
            return Ok(Exit::Usage);
        }
    };
    // A kind's former name (from scripts written before the rename) means
    // the kind it became.
    let kinds: Vec<String> = args
        .kind
        .iter()
        .map(|k| {
            Event::FORMER_KINDS
                .iter()
                .find(|(former, _)| former == k)
                .map_or_else(|| k.clone(), |(_, now)| now.to_string())
        })
        .collect();
    if let Some(bad) = kinds.iter().find(|k| !Event::KINDS.contains(&k.as_str())) {
        eprintln!(
            "error: unknown kind {bad:?}; known kinds: {}",
            Event::KINDS.join(", ")
        );
        return Ok(Exit::Usage);
    }
    if !state.audit().exists() {
        return Err(crate::store::StoreError::NotInitialised {
            path: state.root().to_path_buf(),
        }
        .into());
    }
    if args.lineage && args.batch.is_none() && args.model.is_none() {
        eprintln!("error: --lineage follows a --batch or a --model; give one of them");
        return Ok(Exit::Usage);
    }
    let entries = state.mirror().entries()?;
    let related = args.lineage.then(|| {
        crate::provenance::related(
            &crate::provenance::lineages(&entries),
            args.batch,
            args.model,
        )
    });
    let filter = Filter {
        since,
        until,
        kinds,
        batch: args.batch.filter(|_| related.is_none()),
        model: args.model.filter(|_| related.is_none()),
        limit: None,
    };
    let mut shown: Vec<&audit::Entry> = filter
        .apply(&entries)
        .into_iter()
        .filter(|e| {
            related.as_ref().is_none_or(|r| {
                e.event.batch().is_some_and(|b| r.batches.contains(&b))
                    || e.event.model().is_some_and(|m| r.models.contains(&m))
            })
        })
        .collect();
    if let Some(n) = args.limit {
        let skip = shown.len().saturating_sub(n);
        shown.drain(..skip);
    }
    let mut out = String::new();
    if cli.json {
        for e in shown {
            out.push_str(&e.line());
            out.push('\n');
        }
    } else {
        for line in related.iter().flat_map(|r| &r.summary) {
            out.push_str(line);
            out.push('\n');
        }
        let rows: Vec<Vec<String>> = shown.iter().map(|e| e.cells()).collect();
        out += &super::table_styled(
            &["seq", "time (UTC)", "user", "kind", "what"],
            &rows,
            cli.colored(),
        );
    }
    emit(&out)?;
    Ok(Exit::Ok)
}
