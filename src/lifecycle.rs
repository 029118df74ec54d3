//! Decisions people make about model versions: approve or decline a
//! candidate waiting in approval mode, and roll back to an earlier model.
//! Each moves (or leaves) the store's serving pointer in the same
//! transaction as its audit entry, then refreshes the `serving` file.

use chrono::Utc;

use crate::audit::{Entry, Event, FreshEvidence};
use crate::cycle::META_PENDING;
use crate::ids::ModelId;
use crate::model::ModelError;
use crate::state::{Owner, StateError};
use crate::store::{META_SERVING, Store, StoreError};

/// Why a decision could not be taken.
#[derive(Debug, thiserror::Error)]
pub enum DecisionError {
    #[error("no candidate is waiting for approval")]
    NothingPending,
    #[error("{asked} is not the candidate waiting for approval ({pending} is)")]
    NotPending { asked: ModelId, pending: ModelId },
    #[error("no model serves, so there is nothing to roll back from")]
    NothingServes,
    #[error("{0} already serves")]
    AlreadyServes(ModelId),
    #[error("no earlier model to roll back to: {0} was the first to serve; name one with --to")]
    NoPrevious(ModelId),
    #[error("a reason is required (--reason TEXT): it goes into the audit log")]
    NoReason,
    #[error(
        "{id} trained on {batches}, set aside since (directly or through the model it started from), and the gate judged it with their holdout rows; decline it (the next cycle trains without them) or bring them back first"
    )]
    SawSetAside { id: ModelId, batches: String },
    #[error("model {id} cannot serve: {source}")]
    Unusable {
        id: ModelId,
        #[source]
        source: ModelError,
    },
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    State(#[from] StateError),
    #[error(transparent)]
    Audit(#[from] crate::audit::MirrorError),
}

fn pending(owner: &Owner) -> Result<Option<ModelId>, StoreError> {
    Ok(owner
        .store
        .meta_value(META_PENDING)?
        .and_then(|v| ModelId::from_key(&v)))
}

/// Checks that `id` is the candidate waiting for approval.
fn ensure_pending(owner: &Owner, id: ModelId) -> Result<(), DecisionError> {
    match pending(owner)? {
        None => Err(DecisionError::NothingPending),
        Some(p) if p != id => Err(DecisionError::NotPending {
            asked: id,
            pending: p,
        }),
        Some(_) => Ok(()),
    }
}

fn check_reason(reason: &str) -> Result<(), DecisionError> {
    if reason.trim().is_empty() {
        Err(DecisionError::NoReason)
    } else {
        Ok(())
    }
}

/// A model may serve only if its checkpoint loads, verifies and matches the schema.
fn usable(owner: &Owner, id: ModelId) -> Result<(), DecisionError> {
    owner
        .checkpoint(id)
        .map(|_| ())
        .map_err(|source| DecisionError::Unusable { id, source })
}

fn commit(
    owner: &mut Owner,
    event: Event,
    user: &str,
    serving: Option<ModelId>,
    clear_pending: bool,
) -> Result<Entry, DecisionError> {
    let mut meta = Vec::new();
    if let Some(id) = serving {
        meta.push((META_SERVING, Some(id.key().to_vec())));
        // The fresh-data monitor belongs to one serving tenure.
        meta.push((crate::fresh::META_MONITOR, None));
    }
    if clear_pending {
        meta.push((META_PENDING, None));
    }
    let entry = owner
        .store
        .record_with_meta(event, user, Utc::now(), &meta)?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    if let Some(id) = serving {
        crate::fsutil::write_atomic(&owner.state.serving(), format!("{id}\n").as_bytes()).map_err(
            |source| StateError::Io {
                path: owner.state.serving(),
                source,
            },
        )?;
        crate::export::follow(owner, id, user)?;
    }
    Ok(entry)
}

/// Lets the waiting candidate serve.
pub fn approve(
    owner: &mut Owner,
    id: ModelId,
    reason: &str,
    user: &str,
) -> Result<Entry, DecisionError> {
    check_reason(reason)?;
    ensure_pending(owner, id)?;
    // A batch set aside after the candidate's cycle (while it waited, or
    // queued behind that cycle in the daemon) is in its weights and in the
    // evidence it waits with: approving it would serve what was set aside.
    let saw = crate::cycle::taint(&owner.store, id)?.batches;
    if !saw.is_empty() {
        return Err(DecisionError::SawSetAside {
            id,
            batches: crate::provenance::ranges_text(&saw.into_iter().collect()),
        });
    }
    usable(owner, id)?;
    let previous = owner.store.serving()?;
    let event = Event::Approved {
        model: id,
        previous,
        reason: reason.trim().to_string(),
    };
    commit(owner, event, user, Some(id), true)
}

/// Turns the waiting candidate down; the serving model stays.
pub fn decline(
    owner: &mut Owner,
    id: ModelId,
    reason: &str,
    user: &str,
) -> Result<Entry, DecisionError> {
    check_reason(reason)?;
    ensure_pending(owner, id)?;
    let event = Event::Declined {
        model: id,
        reason: reason.trim().to_string(),
    };
    commit(owner, event, user, None, true)
}

/// Makes an earlier model serve again: `to`, or the model that served
/// before the current one.
pub fn rollback(
    owner: &mut Owner,
    to: Option<ModelId>,
    reason: &str,
    user: &str,
) -> Result<Entry, DecisionError> {
    check_reason(reason)?;
    let from = owner.store.serving()?.ok_or(DecisionError::NothingServes)?;
    let to = match to {
        Some(t) => t,
        None => previous_of(owner, from)?.ok_or(DecisionError::NoPrevious(from))?,
    };
    if to == from {
        return Err(DecisionError::AlreadyServes(to));
    }
    usable(owner, to)?;
    let event = Event::RolledBack {
        from,
        to,
        how: "manual".into(),
        reason: reason.trim().to_string(),
        evidence: None,
    };
    commit(owner, event, user, Some(to), false)
}

/// Lets `to` serve again because the fresh-data check found the serving
/// model `from` significantly worse on rows neither had trained on.
pub fn rollback_automatic(
    owner: &mut Owner,
    from: ModelId,
    to: ModelId,
    evidence: FreshEvidence,
    user: &str,
) -> Result<Entry, DecisionError> {
    if owner.store.serving()? != Some(from) {
        return Err(DecisionError::AlreadyServes(to));
    }
    usable(owner, to)?;
    let event = Event::RolledBack {
        from,
        to,
        how: "automatic".into(),
        reason: format!(
            "fresh-data check on {}: {}",
            evidence.batch, evidence.reason
        ),
        evidence: Some(evidence),
    };
    commit(owner, event, user, Some(to), false)
}

/// How `current` came to serve: the model serving before it, and whether
/// it came back by a rollback (rather than a promotion or an approval).
/// Kept in the store beside each move of the serving pointer; a model that
/// arrived in a store written before those records is looked up in the log.
fn arrival(owner: &Owner, current: ModelId) -> Result<(Option<ModelId>, bool), DecisionError> {
    if let Some(found) = owner.store.arrival(current)? {
        return Ok(found);
    }
    Ok(arrival_from_log(&owner.store, current)?)
}

/// [`arrival`] read from the whole log: the last entry that made `current`
/// serve. (None, false) when it never served.
pub fn arrival_from_log(
    store: &Store,
    current: ModelId,
) -> Result<(Option<ModelId>, bool), StoreError> {
    let mut found = (None, false);
    for (_, line) in store.audit_entries()? {
        let Ok(entry) = Entry::from_line(&line) else {
            continue;
        };
        if let Some((model, previous, by_rollback)) = entry.event.arrival()
            && model == current
        {
            found = (previous, by_rollback);
        }
    }
    Ok(found)
}

/// The model `current` replaced, when it came to serve by promotion or
/// approval; `None` when it was the first or came back by a rollback (a
/// person or the check already chose between the two).
pub fn replaced_by_promotion(
    owner: &Owner,
    current: ModelId,
) -> Result<Option<ModelId>, DecisionError> {
    let (previous, by_rollback) = arrival(owner, current)?;
    Ok(previous.filter(|_| !by_rollback))
}

/// The model that served before `current` started serving.
fn previous_of(owner: &Owner, current: ModelId) -> Result<Option<ModelId>, DecisionError> {
    Ok(arrival(owner, current)?.0)
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::audit::GateEvidence;
    use crate::config::Config;
    use crate::schema::Schema;

    /// A new store under `dir` for a small schema.
    fn small_config() -> Config {
        let text = "[data]\ntarget = \"y\"\ntask = \"regression\"\n[[data.columns]]\nname = \"x\"\n\
                    kind = \"number\"\n[[data.columns]]\nname = \"y\"\nkind = \"number\"\n";
        Config::parse(text, std::path::Path::new("t.toml")).unwrap()
    }

    pub(crate) fn store_in(dir: &std::path::Path) -> Store {
        store_at(dir, Store::create)
    }

    /// The small schema's store under `dir`, made or opened by `how`.
    fn store_at(
        dir: &std::path::Path,
        how: fn(&std::path::Path, &Schema, &str) -> Result<Store, StoreError>,
    ) -> Store {
        let config = small_config();
        how(
            &dir.join("store"),
            &Schema::from_config(&config),
            &config.schema_fingerprint(),
        )
        .unwrap()
    }

    pub(crate) fn promoted(model: u64, previous: Option<u64>) -> Event {
        Event::Promoted {
            cycle: model,
            model: ModelId(model),
            previous: previous.map(ModelId),
            evidence: GateEvidence::without_test(100, 1.0, 0.9, "better".into()),
        }
    }

    #[test]
    fn stored_arrivals_match_a_full_reading_of_the_log() {
        let dir = tempfile::tempdir().unwrap();
        let mut store = store_in(dir.path());
        let rolled = |from: u64, to: u64| Event::RolledBack {
            from: ModelId(from),
            to: ModelId(to),
            how: "manual".into(),
            reason: "test".into(),
            evidence: None,
        };
        let approved = |model: u64, previous: u64| Event::Approved {
            model: ModelId(model),
            previous: Some(ModelId(previous)),
            reason: "looks right".into(),
        };
        let declined = |model: u64| Event::Declined {
            model: ModelId(model),
            reason: "no".into(),
        };
        // Every way the pointer moves, a model arriving twice in different
        // ways (m1, m2), and entries that move nothing.
        let events = vec![
            promoted(1, None),
            promoted(2, Some(1)),
            rolled(2, 1),
            declined(3),
            approved(4, 1),
            promoted(5, Some(4)),
            rolled(5, 2),
            promoted(6, Some(2)),
            rolled(6, 5),
            promoted(1, Some(5)),
        ];
        for e in events {
            store
                .record_with_meta(e, "tester", chrono::Utc::now(), &[])
                .unwrap();
        }
        for m in 1..=7 {
            let from_log = arrival_from_log(&store, ModelId(m)).unwrap();
            let stored = store.arrival(ModelId(m)).unwrap();
            if [3, 7].contains(&m) {
                assert_eq!(stored, None, "m{m} never served");
                assert_eq!(from_log, (None, false));
            } else {
                assert_eq!(stored, Some(from_log), "m{m}");
            }
        }
        assert_eq!(
            store.arrival(ModelId(1)).unwrap(),
            Some((Some(ModelId(5)), false))
        );
        assert_eq!(
            store.arrival(ModelId(5)).unwrap(),
            Some((Some(ModelId(6)), true))
        );
        // And they survive a reopen, as the log does.
        drop(store);
        let store = store_at(dir.path(), Store::open);
        assert_eq!(
            store.arrival(ModelId(2)).unwrap(),
            Some((Some(ModelId(5)), true))
        );
    }
}
