//! The state directory: where each thing lives, the owner lock, creation,
//! and the start-up recovery every owner runs before doing anything else.

use std::fs;
use std::io::{Read, Seek, Write};
use std::os::unix::fs::{DirBuilderExt, MetadataExt};
use std::path::{Path, PathBuf};

use crate::audit::{Event, Mirror};
use crate::config::Config;
use crate::fsutil;
use crate::schema::Schema;
use crate::store::{Store, StoreError};

/// Paths inside one state dir.
#[derive(Debug, Clone)]
pub struct StateDir {
    root: PathBuf,
}

impl StateDir {
    pub fn new(root: impl Into<PathBuf>) -> StateDir {
        StateDir { root: root.into() }
    }
    pub fn root(&self) -> &Path {
        &self.root
    }
    pub fn lock(&self) -> PathBuf {
        self.root.join("LOCK")
    }
    pub fn store(&self) -> PathBuf {
        self.root.join("store")
    }
    pub fn audit(&self) -> PathBuf {
        self.root.join("audit.jsonl")
    }
    pub fn config(&self) -> PathBuf {
        self.root.join("tidegate.toml")
    }
    pub fn inbox(&self) -> PathBuf {
        self.root.join("inbox")
    }
    pub fn archive(&self) -> PathBuf {
        self.root.join("archive")
    }
    /// The row files: one Parquet file per accepted batch.
    pub fn rows(&self) -> PathBuf {
        crate::store::rows_dir_of(&self.store())
    }
    /// Refused files and their reasons.
    pub fn refused(&self) -> PathBuf {
        self.root.join(REFUSED)
    }
    /// Where versions before the name was settled kept refused files; an
    /// owner's start moves them to `refused()` (see `rename_refused_folder`).
    pub fn former_refused(&self) -> PathBuf {
        self.root.join(FORMER_REFUSED)
    }
    pub fn models(&self) -> PathBuf {
        self.root.join("models")
    }
    pub fn serving(&self) -> PathBuf {
        self.root.join("serving")
    }
    pub fn control_socket(&self) -> PathBuf {
        self.root.join("control.sock")
    }
    pub fn mirror(&self) -> Mirror {
        Mirror::new(self.audit())
    }
    pub fn is_initialised(&self) -> bool {
        self.config().is_file() && self.store().is_dir()
    }
}

/// Failures of the state dir as a whole.
#[derive(Debug, thiserror::Error)]
pub enum StateError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path} already holds a tidegate state dir; pick another --state or remove it first")]
    AlreadyInitialised { path: PathBuf },
    #[error("{path} exists and is not empty; tidegate init needs a new or empty folder")]
    NotEmpty { path: PathBuf },
    #[error(transparent)]
    Audit(#[from] crate::audit::MirrorError),
    #[error(transparent)]
    Export(#[from] crate::export::ExportError),
    #[error("the fresh-data check of a batch that missed it: {0}")]
    Fresh(Box<crate::fresh::FreshError>),
}

fn io_at(path: &Path) -> impl FnOnce(std::io::Error) -> StateError + '_ {
    move |source| StateError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// The exclusive hold on a state dir; released when dropped (or when the
/// process dies, however it dies).
#[derive(Debug)]
pub struct OwnerLock {
    _file: fs::File,
}

/// Takes `LOCK` without waiting; a holder's PID is named in the error.
pub fn take_lock(state: &StateDir) -> Result<OwnerLock, StateError> {
    let path = state.lock();
    let mut file = fs::OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .open(&path)
        .map_err(io_at(&path))?;
    match file.try_lock() {
        Ok(()) => {}
        Err(fs::TryLockError::WouldBlock) => {
            // The holder writes its PID just after locking: give it a moment.
            let mut pid = String::new();
            for _ in 0..20 {
                pid.clear();
                let _ = file.rewind().and_then(|()| file.read_to_string(&mut pid));
                if !pid.trim().is_empty() {
                    break;
                }
                std::thread::sleep(std::time::Duration::from_millis(5));
            }
            let pid = pid.trim();
            let pid = if pid.is_empty() {
                "unknown".to_string()
            } else {
                pid.to_string()
            };
            return Err(StoreError::Locked {
                path: state.root().to_path_buf(),
                pid,
            }
            .into());
        }
        Err(fs::TryLockError::Error(e)) => return Err(io_at(&path)(e)),
    }
    file.set_len(0).map_err(io_at(&path))?;
    file.rewind().map_err(io_at(&path))?;
    writeln!(file, "{}", std::process::id()).map_err(io_at(&path))?;
    file.sync_all().map_err(io_at(&path))?;
    Ok(OwnerLock { _file: file })
}

/// The process that owns a state dir: the lock, the open store and the
/// audit mirror. Only one exists per state dir at a time.
pub struct Owner {
    pub state: StateDir,
    pub config: Config,
    pub store: Store,
    pub mirror: Mirror,
    _lock: OwnerLock,
}

impl Owner {
    /// Model `id`'s checkpoint, loaded, verified and checked against this
    /// state dir's schema.
    pub fn checkpoint(
        &self,
        id: crate::ids::ModelId,
    ) -> Result<crate::model::checkpoint::Checkpoint, crate::model::ModelError> {
        crate::model::checkpoint::Checkpoint::load(
            &crate::model::checkpoint::model_dir(&self.state.models(), id),
            &self.config.schema_fingerprint(),
        )
    }
}

/// Creates a state dir (mode 0700) from a config: folders, the config copy,
/// the store and the first audit entry.
pub fn create(
    state: &StateDir,
    config: &Config,
    config_text: &str,
    user: &str,
) -> Result<Owner, StateError> {
    let root = state.root();
    if state.config().exists() || state.store().exists() {
        return Err(StateError::AlreadyInitialised {
            path: root.to_path_buf(),
        });
    }
    if root.exists() {
        // An empty folder, or one holding only a README, is fine.
        let others = fs::read_dir(root)
            .map_err(io_at(root))?
            .filter_map(Result::ok)
            .filter(|e| e.file_name() != "README.md")
            .count();
        if others > 0 {
            return Err(StateError::NotEmpty {
                path: root.to_path_buf(),
            });
        }
    }
    let mut builder = fs::DirBuilder::new();
    builder.recursive(true).mode(0o700);
    builder.create(root).map_err(io_at(root))?;
    use std::os::unix::fs::PermissionsExt;
    fs::set_permissions(root, fs::Permissions::from_mode(0o700)).map_err(io_at(root))?;
    let lock = take_lock(state)?;
    for dir in [
        state.inbox(),
        state.inbox().join(".tmp"),
        state.archive(),
        state.refused(),
        state.models(),
    ] {
        builder.create(&dir).map_err(io_at(&dir))?;
    }
    let schema = Schema::from_config(config);
    let fingerprint = config.schema_fingerprint();
    let mut store = Store::create(&state.store(), &schema, &fingerprint)?;
    let event = Event::Initialized {
        schema_fingerprint: fingerprint,
        config_hash: blake3::hash(config_text.as_bytes()).to_hex().to_string(),
        columns: schema.columns.iter().map(|c| c.name.clone()).collect(),
        target: schema.columns[schema.target].name.clone(),
        task: schema.task.to_string(),
    };
    let entry = store.record(event, user, chrono::Utc::now())?;
    let mirror = state.mirror();
    mirror.append(&[entry.line().as_bytes()])?;
    // The config copy is written last: its presence marks a finished init.
    fsutil::write_atomic(&state.config(), config_text.as_bytes())
        .map_err(io_at(&state.config()))?;
    fsutil::sync_dir(root).map_err(io_at(root))?;
    Ok(Owner {
        state: state.clone(),
        config: config.clone(),
        store,
        mirror,
        _lock: lock,
    })
}

/// What start-up recovery found and fixed.
#[derive(Debug, Default, Clone, PartialEq)]
pub struct Recovery {
    pub stale_temps: usize,
    pub audit_reappended: usize,
    pub pending_archived: usize,
    pub pending_dropped: usize,
    pub serving_rewritten: bool,
    pub abandoned_cycle: Option<u64>,
    /// The configured ONNX export did not hold the serving model and was
    /// written again.
    pub export_rewritten: bool,
    /// Refused files moved from the folder's former name (`None`: there was
    /// no such folder).
    pub refused_moved: Option<u64>,
    /// Batches stored without their fresh-data check (a crash or failure
    /// between the commit and the check) whose check ran now.
    pub fresh_checks_run: usize,
    /// Row files no batch record named (written by a commit a crash cut
    /// short, or replaced since), deleted.
    pub row_files_dropped: usize,
    /// Batches of a store from before row files whose rows were moved to
    /// row files now.
    pub rows_moved: usize,
}

/// Opens a state dir as its owner: takes the lock, opens the store, then
/// repairs whatever a crash left (stale temps, unarchived accepted files,
/// audit lines missing from `audit.jsonl`, fresh-data checks that did not
/// run).
pub fn open(state: &StateDir, config: &Config) -> Result<(Owner, Recovery), StateError> {
    open_with(state, config, true)
}

/// Like `open`, but leaves `audit.jsonl` as it is (for `verify`, which must
/// report a log that lags or differs rather than repair it).
pub fn open_untouched_log(
    state: &StateDir,
    config: &Config,
) -> Result<(Owner, Recovery), StateError> {
    open_with(state, config, false)
}

fn open_with(
    state: &StateDir,
    config: &Config,
    catch_up_log: bool,
) -> Result<(Owner, Recovery), StateError> {
    if !state.is_initialised() {
        return Err(StoreError::NotInitialised {
            path: state.root().to_path_buf(),
        }
        .into());
    }
    let lock = take_lock(state)?;
    let schema = Schema::from_config(config);
    let mut store = Store::open(&state.store(), &schema, &config.schema_fingerprint())?;
    let mirror = state.mirror();
    let mut rec = Recovery::default();
    for dir in [
        state.root().to_path_buf(),
        state.archive(),
        state.refused(),
        state.former_refused(),
        state.models(),
        state.rows(),
    ] {
        if dir.is_dir() {
            rec.stale_temps += fsutil::remove_stale_temps(&dir).map_err(io_at(&dir))?;
        }
    }
    crate::failpoint::hit("state:during-recovery").map_err(io_at(state.root()))?;
    let (archived, dropped) = crate::intake::settle_pending(state, &store)?;
    rec.pending_archived = archived;
    rec.pending_dropped = dropped;
    rec.row_files_dropped = store.drop_unnamed_row_files()?;
    // The store is the authority on which model serves; the `serving` file
    // is its mirror for read-only commands, rewritten if a crash left it behind.
    if let Some(id) = store.serving()? {
        let want = format!("{id}\n");
        if fs::read_to_string(state.serving()).ok().as_deref() != Some(want.as_str()) {
            fsutil::write_atomic(&state.serving(), want.as_bytes())
                .map_err(io_at(&state.serving()))?;
            rec.serving_rewritten = true;
        }
    } else if state.serving().exists() {
        // Nothing serves (e.g. after a schema migration): no stale mirror.
        fs::remove_file(state.serving()).map_err(io_at(&state.serving()))?;
        rec.serving_rewritten = true;
    }
    crate::failpoint::hit("state:before-catch-up").map_err(io_at(&state.audit()))?;
    if catch_up_log {
        // Before the log is caught up, so that the mirror gets the entries.
        rec.rows_moved = store
            .move_rows_to_files(&current_user(), chrono::Utc::now())?
            .len();
        rec.audit_reappended = mirror.catch_up(&store.audit_entries()?)?;
        rec.abandoned_cycle = close_open_cycle(&mut store, &mirror, &current_user())?;
        rec.refused_moved = rename_refused_folder(state, &mut store, &mirror, &current_user())?;
        rec.export_rewritten =
            crate::export::catch_up(state, config, &mut store, &mirror, &current_user())?;
    }
    let mut owner = Owner {
        state: state.clone(),
        config: config.clone(),
        store,
        mirror,
        _lock: lock,
    };
    if catch_up_log {
        // Last: the check may roll back, which needs the log caught up.
        rec.fresh_checks_run = crate::fresh::run_missing(&mut owner, &current_user())
            .map_err(|e| StateError::Fresh(Box::new(e)))?;
    }
    Ok((owner, rec))
}

/// The folder refused files are written to.
pub const REFUSED: &str = "refused";
/// Its name in state dirs written before the name was settled.
pub const FORMER_REFUSED: &str = "rejected";

/// Moves refused files from the folder's former name to `refused/` and
/// records it, so that `kept_as` paths of earlier entries can be followed.
/// The entry is written first: a crash before the move ends leaves the old
/// folder, and the next start moves the rest and records that too, so the
/// log may repeat the move but never miss it. A name already taken in
/// `refused/` (which no version writes twice) stays where it is. Returns
/// the files moved, or `None` when there is no old folder.
pub fn rename_refused_folder(
    state: &StateDir,
    store: &mut Store,
    mirror: &Mirror,
    user: &str,
) -> Result<Option<u64>, StateError> {
    let old = state.former_refused();
    if !old.is_dir() {
        return Ok(None);
    }
    let new = state.refused();
    let mut names = Vec::new();
    for item in fs::read_dir(&old).map_err(io_at(&old))? {
        let name = item.map_err(io_at(&old))?.file_name();
        if fs::symlink_metadata(new.join(&name)).is_err() {
            names.push(name);
        }
    }
    let entry = store.record(
        Event::FolderRenamed {
            from: FORMER_REFUSED.into(),
            to: REFUSED.into(),
            files: names.len() as u64,
        },
        user,
        chrono::Utc::now(),
    )?;
    mirror.append(&[entry.line().as_bytes()])?;
    if !new.exists() {
        // One atomic rename moves everything.
        fs::rename(&old, &new).map_err(io_at(&old))?;
    } else {
        for name in &names {
            fs::rename(old.join(name), new.join(name)).map_err(io_at(&old.join(name)))?;
        }
        fsutil::sync_dir(&new).map_err(io_at(&new))?;
        // Left only if something in it could not move; then it stays.
        if fs::read_dir(&old).map_err(io_at(&old))?.next().is_none() {
            fs::remove_dir(&old).map_err(io_at(&old))?;
        }
    }
    fsutil::sync_dir(state.root()).map_err(io_at(state.root()))?;
    Ok(Some(names.len() as u64))
}

/// Records a cycle that started and never ended (cut short by a crash, a
/// cancel or a failure) as abandoned; it changed nothing. Returns its number.
pub fn close_open_cycle(
    store: &mut Store,
    mirror: &Mirror,
    user: &str,
) -> Result<Option<u64>, StateError> {
    let Some(v) = store.meta_value(crate::store::META_OPEN_CYCLE)? else {
        return Ok(None);
    };
    let Ok(bytes) = <[u8; 8]>::try_from(v.as_slice()) else {
        return Ok(None);
    };
    let cycle = u64::from_be_bytes(bytes);
    let entry = store.record_with_meta(
        Event::CycleAbandoned { cycle },
        user,
        chrono::Utc::now(),
        &[(crate::store::META_OPEN_CYCLE, None)],
    )?;
    mirror.append(&[entry.line().as_bytes()])?;
    Ok(Some(cycle))
}

/// The acting user: the login name, or the numeric uid when none is set.
pub fn current_user() -> String {
    for var in ["USER", "LOGNAME"] {
        if let Ok(u) = std::env::var(var)
            && !u.is_empty()
        {
            return u;
        }
    }
    match fs::metadata("/proc/self") {
        Ok(m) => format!("uid {}", m.uid()),
        Err(_) => "unknown".into(),
    }
}

/// The PID of the process holding `LOCK`, if any, read from /proc/locks
/// so that asking never takes (and so never disturbs) the lock.
pub fn owner_pid(state: &StateDir) -> Option<u32> {
    let inode = fs::metadata(state.lock()).ok()?.ino();
    let locks = fs::read_to_string("/proc/locks").ok()?;
    locks.lines().find_map(|line| {
        // "1: FLOCK  ADVISORY  WRITE 4242 fd:01:123456 0 EOF"
        let fields: Vec<&str> = line.split_whitespace().collect();
        let (pid, dev_ino) = (fields.get(4)?, fields.get(5)?);
        let ino: u64 = dev_ino.rsplit(':').next()?.parse().ok()?;
        if ino == inode && fields.get(1) == Some(&"FLOCK") {
            pid.parse().ok()
        } else {
            None
        }
    })
}
