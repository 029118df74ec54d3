//! Setting a stored batch aside by hand, and bringing it back: for the
//! operator who learns later that a file came from a broken export. The
//! rows stay stored and archived and keep their side of the holdout split
//! (a function of the row alone); while the batch is set aside nothing
//! reads them: not training, holdout scoring, baselines, drift nor the
//! fresh-data check. The batch's record and the audit entry, with the
//! acting user and the reason, change in one transaction.

use chrono::Utc;

use crate::audit::{Entry, Event};
use crate::ids::BatchId;
use crate::state::Owner;
use crate::store::StoreError;

#[derive(Debug, thiserror::Error)]
pub enum AsideError {
    #[error("no batch {0} is stored; `tidegate log --kind batch-accepted` lists the batches")]
    NoSuchBatch(BatchId),
    #[error("batch {0} is already set aside")]
    AlreadyAside(BatchId),
    #[error("batch {0} is not set aside")]
    NotAside(BatchId),
    #[error("a reason is required (--reason TEXT): it goes into the audit log")]
    NoReason,
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Audit(#[from] crate::audit::MirrorError),
}

/// Sets `batch` aside (`aside = true`) or brings it back, with `reason`.
pub fn change(
    owner: &mut Owner,
    batch: BatchId,
    aside: bool,
    reason: &str,
    user: &str,
) -> Result<Entry, AsideError> {
    let reason = reason.trim();
    if reason.is_empty() {
        return Err(AsideError::NoReason);
    }
    let record = owner
        .store
        .batch(batch)?
        .ok_or(AsideError::NoSuchBatch(batch))?;
    match (record.is_set_aside(), aside) {
        (true, true) => return Err(AsideError::AlreadyAside(batch)),
        (false, false) => return Err(AsideError::NotAside(batch)),
        _ => {}
    }
    let event = if aside {
        Event::BatchSetAside {
            batch,
            reason: reason.to_string(),
        }
    } else {
        Event::BatchBroughtBack {
            batch,
            reason: reason.to_string(),
        }
    };
    let (_, entry) =
        owner
            .store
            .set_batch_aside(batch, aside.then_some(reason), event, user, Utc::now())?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    Ok(entry)
}
