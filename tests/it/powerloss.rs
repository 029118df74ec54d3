//! Power-loss states of the two operations that matter most, accepting a
//! batch (`ingest`) and promoting a model (`retrain`), in the manner of
//! application-level crash-consistency checking (Pillai et al., OSDI 2014):
//!
//! 1. the operation runs once under `strace`, which records every write,
//!    `pwrite64`, truncation, `fsync`/`fdatasync` (of files and folders),
//!    rename, unlink and creation in the state dir, sled's included;
//! 2. a model of the file system replays the record on the state dir as it
//!    was before, keeping for every file what is durable (its content at its
//!    last fsync; for names, the folder's state at its last fsync) apart
//!    from what is only in the page cache;
//! 3. after every recorded step, the states a power loss could leave are
//!    built: only what is durable; the names as the process saw them with
//!    only durable contents; and each prefix of the unsynced writes, in
//!    order, the last one cut short (half written). Writes are kept in order
//!    (no reordering between files), the bounded form of the method.
//! 4. each distinct state is opened by tidegate (the owner's start-up
//!    recovery), the operation's invariants are checked: `verify` passes,
//!    no row is lost or doubled, the serving model is the old or the new
//!    one.
//!
//! CI explores a deterministic spread of at most `TIDEGATE_POWERLOSS_STATES`
//! states per operation (40 unless set; 0 means all). Without `strace` the
//! test skips, except under `CI=true`.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::fs;
use std::hash::{Hash, Hasher};
use std::path::{Path, PathBuf};
use std::process::Command;

use crate::support::{Env, code, stderr, stdout, tiny_rows};

/// Decodes strace's `-xx` escapes (`\x2f`) and plain characters.
fn unescape(s: &str) -> Vec<u8> {
    let b = s.as_bytes();
    let mut out = Vec::with_capacity(b.len() / 4);
    let mut i = 0;
    while i < b.len() {
        if b[i] == b'\\' && i + 1 < b.len() {
            match b[i + 1] {
                b'x' => {
                    let hex = std::str::from_utf8(&b[i + 2..i + 4]).unwrap();
                    out.push(u8::from_str_radix(hex, 16).unwrap());
                    i += 4;
                    continue;
                }
                b'n' => out.push(b'\n'),
                b't' => out.push(b'\t'),
                b'\\' => out.push(b'\\'),
                b'"' => out.push(b'"'),
                other => out.push(other),
            }
            i += 2;
        } else {
            out.push(b[i]);
            i += 1;
        }
    }
    out
}

/// Top-level arguments of a call (`a, "b", [c, d]`), split at commas
/// outside quotes and brackets.
fn split_args(s: &str) -> Vec<String> {
    let mut out = Vec::new();
    let (mut depth, mut quoted, mut escaped) = (0i32, false, false);
    let mut cur = String::new();
    for c in s.chars() {
        if quoted {
            cur.push(c);
            if escaped {
                escaped = false;
            } else if c == '\\' {
                escaped = true;
            } else if c == '"' {
                quoted = false;
            }
            continue;
        }
        match c {
            '"' => {
                quoted = true;
                cur.push(c)
            }
            '(' | '[' | '{' => {
                depth += 1;
                cur.push(c)
            }
            ')' | ']' | '}' => {
                depth -= 1;
                cur.push(c)
            }
            ',' if depth == 0 => out.push(std::mem::take(&mut cur).trim().to_string()),
            _ => cur.push(c),
        }
    }
    if !cur.trim().is_empty() {
        out.push(cur.trim().to_string());
    }
    out
}

/// The string argument `"…"` (refusing one strace cut short).
fn string_arg(a: &str) -> Vec<u8> {
    assert!(
        a.starts_with('"') && a.ends_with('"'),
        "strace cut a buffer short: {a:.80}"
    );
    unescape(&a[1..a.len() - 1])
}

/// `5<\x2f…>` → (5, path).
fn fd_arg(a: &str) -> Option<(i64, PathBuf)> {
    let (n, rest) = a.split_once('<')?;
    let path = unescape(rest.strip_suffix('>')?);
    Some((
        n.trim().parse().ok()?,
        PathBuf::from(String::from_utf8(path).ok()?),
    ))
}

/// One recorded step that touches the state dir.
#[derive(Debug, Clone)]
enum Step {
    Open {
        fd: i64,
        path: PathBuf,
        create: bool,
        truncate: bool,
        append: bool,
    },
    Write {
        fd: i64,
        at: Option<u64>,
        data: Vec<u8>,
    },
    Truncate {
        fd: i64,
        len: u64,
    },
    Sync {
        fd: i64,
    },
    Rename {
        from: PathBuf,
        to: PathBuf,
    },
    Unlink {
        path: PathBuf,
    },
    /// A hard link: a second name for the same file.
    Link {
        from: PathBuf,
        to: PathBuf,
    },
    Mkdir {
        path: PathBuf,
    },
}

/// The calls recorded: every one that can change a file or a name.
const TRACED: &str = "openat,write,pwrite64,writev,pwritev,fsync,fdatasync,rename,renameat,\
     renameat2,link,linkat,unlink,unlinkat,ftruncate,mkdir,mkdirat,copy_file_range,sendfile";

/// Splits `args) = result` at the last `)` followed by blanks and `= `.
fn split_result(after: &str) -> Option<(&str, &str)> {
    after.rmatch_indices(')').find_map(|(at, _)| {
        let rest = after[at + 1..].trim_start();
        rest.strip_prefix("= ")
            .map(|ret| (&after[..at], ret.trim()))
    })
}

/// Parses an strace record (`-f -y -xx -s N`), joining calls that other
/// threads interrupted; keeps successful calls, in completion order.
fn parse_trace(text: &str, root: &Path) -> Vec<Step> {
    let mut partial: HashMap<String, String> = HashMap::new();
    let mut steps = Vec::new();
    let inside = |p: &Path| p.starts_with(root);
    for raw in text.lines() {
        let Some((pid, rest)) = raw.split_once(' ') else {
            continue;
        };
        let rest = rest.trim_start();
        let line = if let Some(head) = rest.strip_suffix(" <unfinished ...>") {
            partial.insert(pid.to_string(), head.to_string());
            continue;
        } else if rest.starts_with("<... ") {
            let Some(head) = partial.remove(pid) else {
                continue;
            };
            let tail = rest.split_once("resumed>").map_or("", |(_, t)| t);
            format!("{head}{tail}")
        } else {
            rest.to_string()
        };
        let Some((call, after)) = line.split_once('(') else {
            continue;
        };
        // strace pads the gap before `=` when it joins a resumed call
        // (`<... fsync resumed>)     = 0`): a call lost here would be a
        // write or sync the model never replays.
        let Some((args, ret)) = split_result(after) else {
            assert!(
                !TRACED.split(',').any(|c| c == call),
                "an strace line the model cannot read: {line:.300}"
            );
            continue;
        };
        if ret.starts_with('-') || ret.starts_with('?') {
            continue;
        }
        let args = split_args(args);
        let step = match call {
            "openat" => {
                let Some((fd, path)) = fd_arg(ret) else {
                    continue;
                };
                let flags = &args[2];
                Step::Open {
                    fd,
                    path,
                    create: flags.contains("O_CREAT"),
                    truncate: flags.contains("O_TRUNC"),
                    append: flags.contains("O_APPEND"),
                }
            }
            "write" | "pwrite64" => {
                let Some((fd, path)) = fd_arg(&args[0]) else {
                    continue;
                };
                if !inside(&path) {
                    continue;
                }
                let mut data = string_arg(&args[1]);
                let written: usize = ret.parse().unwrap();
                data.truncate(written);
                let at = (call == "pwrite64").then(|| args[3].parse().unwrap());
                Step::Write { fd, at, data }
            }
            "ftruncate" => {
                let Some((fd, path)) = fd_arg(&args[0]) else {
                    continue;
                };
                if !inside(&path) {
                    continue;
                }
                Step::Truncate {
                    fd,
                    len: args[1].parse().unwrap(),
                }
            }
            "fsync" | "fdatasync" => {
                let Some((fd, path)) = fd_arg(&args[0]) else {
                    continue;
                };
                if !inside(&path) {
                    continue;
                }
                Step::Sync { fd }
            }
            "rename" | "renameat" | "renameat2" => {
                let names: Vec<PathBuf> = args
                    .iter()
                    .filter(|a| a.starts_with('"'))
                    .map(|a| PathBuf::from(String::from_utf8(string_arg(a)).unwrap()))
                    .collect();
                Step::Rename {
                    from: names[0].clone(),
                    to: names[1].clone(),
                }
            }
            "link" | "linkat" => {
                let names: Vec<PathBuf> = args
                    .iter()
                    .filter(|a| a.starts_with('"'))
                    .map(|a| PathBuf::from(String::from_utf8(string_arg(a)).unwrap()))
                    .collect();
                Step::Link {
                    from: names[0].clone(),
                    to: names[1].clone(),
                }
            }
            "unlink" | "unlinkat" => {
                let name = args.iter().find(|a| a.starts_with('"')).unwrap();
                Step::Unlink {
                    path: PathBuf::from(String::from_utf8(string_arg(name)).unwrap()),
                }
            }
            "mkdir" | "mkdirat" => {
                let name = args.iter().find(|a| a.starts_with('"')).unwrap();
                Step::Mkdir {
                    path: PathBuf::from(String::from_utf8(string_arg(name)).unwrap()),
                }
            }
            "writev" | "pwritev" | "copy_file_range" | "sendfile" => {
                if args
                    .first()
                    .and_then(|a| fd_arg(a))
                    .is_some_and(|(_, p)| inside(&p))
                {
                    panic!("the model does not replay {call} yet: {line:.200}");
                }
                continue;
            }
            _ => continue,
        };
        // Names must be absolute (tidegate runs with an absolute --state).
        let keep = match &step {
            Step::Open { path, .. } | Step::Unlink { path } | Step::Mkdir { path } => inside(path),
            Step::Rename { from, to } | Step::Link { from, to } => inside(from) || inside(to),
            _ => true,
        };
        if keep {
            steps.push(step);
        }
    }
    steps
}

type State = BTreeMap<PathBuf, Vec<u8>>;

/// Which of the three kinds of crash state.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Kind {
    /// Only what was fsynced (contents and names).
    Durable,
    /// Names as the process saw them, contents as fsynced.
    Names,
    /// A prefix of the unsynced writes in order, the last cut short.
    Prefix,
}

/// An unsynced change: a write (offset, bytes) or a truncation (length).
type Pending = (Option<(u64, Vec<u8>)>, Option<u64>);

#[derive(Debug, Clone, Default)]
struct Inode {
    durable: Vec<u8>,
    volatile: Vec<u8>,
    /// Writes and truncations since the last fsync, in order.
    pending: Vec<Pending>,
}

fn apply_write(content: &mut Vec<u8>, at: u64, data: &[u8]) {
    let at = usize::try_from(at).unwrap();
    if content.len() < at + data.len() {
        content.resize(at + data.len(), 0);
    }
    content[at..at + data.len()].copy_from_slice(data);
}

/// The file system as the recorded steps leave it, durable and not.
#[derive(Clone)]
struct Model {
    inodes: Vec<Inode>,
    names: BTreeMap<PathBuf, usize>,
    durable_names: BTreeMap<PathBuf, usize>,
    dirs: BTreeSet<PathBuf>,
    fds: HashMap<i64, (Option<usize>, Option<PathBuf>, u64, bool)>,
    /// (inode, pending index) of each unsynced write, in order.
    unsynced: Vec<(usize, usize)>,
    /// Folders renamed since their parent's last fsync: (from, to).
    dir_renames: Vec<(PathBuf, PathBuf)>,
}

/// Moves every name under `from` to the same place under `to`.
fn move_prefix(names: &mut BTreeMap<PathBuf, usize>, from: &Path, to: &Path) {
    let moved: Vec<(PathBuf, usize)> = names
        .iter()
        .filter(|(p, _)| p.starts_with(from))
        .map(|(p, &i)| (to.join(p.strip_prefix(from).unwrap()), i))
        .collect();
    names.retain(|p, _| !p.starts_with(from));
    names.extend(moved);
}

impl Model {
    fn load(root: &Path) -> Model {
        let mut m = Model {
            inodes: Vec::new(),
            names: BTreeMap::new(),
            durable_names: BTreeMap::new(),
            dirs: BTreeSet::new(),
            fds: HashMap::new(),
            unsynced: Vec::new(),
            dir_renames: Vec::new(),
        };
        let mut stack = vec![root.to_path_buf()];
        while let Some(dir) = stack.pop() {
            m.dirs.insert(dir.clone());
            for e in fs::read_dir(&dir).unwrap() {
                let e = e.unwrap();
                let t = e.file_type().unwrap();
                if t.is_dir() {
                    stack.push(e.path());
                } else if t.is_file() {
                    let bytes = fs::read(e.path()).unwrap();
                    m.inodes.push(Inode {
                        durable: bytes.clone(),
                        volatile: bytes,
                        pending: Vec::new(),
                    });
                    m.names.insert(e.path(), m.inodes.len() - 1);
                }
                // Sockets and other special files are not state.
            }
        }
        m.durable_names = m.names.clone();
        m
    }

    fn apply(&mut self, step: &Step) {
        match step {
            Step::Open {
                fd,
                path,
                create,
                truncate,
                append,
            } => {
                if self.dirs.contains(path) {
                    self.fds.insert(*fd, (None, Some(path.clone()), 0, false));
                    return;
                }
                let ino = match self.names.get(path) {
                    Some(&i) => i,
                    None => {
                        assert!(*create, "{} opened but never created", path.display());
                        self.inodes.push(Inode::default());
                        self.names.insert(path.clone(), self.inodes.len() - 1);
                        self.inodes.len() - 1
                    }
                };
                if *truncate {
                    let node = &mut self.inodes[ino];
                    node.volatile.clear();
                    node.pending.push((None, Some(0)));
                }
                self.fds.insert(*fd, (Some(ino), None, 0, *append));
            }
            Step::Write { fd, at, data } => {
                let Some(&(Some(ino), _, offset, append)) = self.fds.get(fd) else {
                    return;
                };
                let node = &mut self.inodes[ino];
                let at = match at {
                    Some(a) => *a,
                    None if append => node.volatile.len() as u64,
                    None => offset,
                };
                apply_write(&mut node.volatile, at, data);
                node.pending.push((Some((at, data.clone())), None));
                self.unsynced.push((ino, node.pending.len() - 1));
                if step_is_plain_write(step) {
                    self.fds.get_mut(fd).unwrap().2 = at + data.len() as u64;
                }
            }
            Step::Truncate { fd, len } => {
                let Some(&(Some(ino), ..)) = self.fds.get(fd) else {
                    return;
                };
                let node = &mut self.inodes[ino];
                node.volatile.resize(usize::try_from(*len).unwrap(), 0);
                node.pending.push((None, Some(*len)));
            }
            Step::Sync { fd } => match self.fds.get(fd) {
                Some((Some(ino), ..)) => {
                    let ino = *ino;
                    let node = &mut self.inodes[ino];
                    node.durable = node.volatile.clone();
                    node.pending.clear();
                    self.unsynced.retain(|(i, _)| *i != ino);
                }
                Some((None, Some(dir), ..)) => {
                    let dir = dir.clone();
                    let renames = std::mem::take(&mut self.dir_renames);
                    for (from, to) in renames {
                        if from.parent() == Some(dir.as_path()) {
                            move_prefix(&mut self.durable_names, &from, &to);
                        } else {
                            self.dir_renames.push((from, to));
                        }
                    }
                    let child = |p: &Path| p.parent() == Some(dir.as_path());
                    self.durable_names.retain(|p, _| !child(p));
                    for (p, i) in &self.names {
                        if child(p) {
                            self.durable_names.insert(p.clone(), *i);
                        }
                    }
                }
                _ => {}
            },
            Step::Rename { from, to } => {
                if let Some(i) = self.names.remove(from) {
                    self.names.insert(to.clone(), i);
                } else if self.dirs.contains(from) {
                    let dirs: Vec<PathBuf> = self
                        .dirs
                        .iter()
                        .filter(|d| d.starts_with(from))
                        .map(|d| to.join(d.strip_prefix(from).unwrap()))
                        .collect();
                    self.dirs.retain(|d| !d.starts_with(from));
                    self.dirs.extend(dirs);
                    move_prefix(&mut self.names, from, to);
                    self.dir_renames.push((from.clone(), to.clone()));
                }
            }
            Step::Unlink { path } => {
                self.names.remove(path);
            }
            Step::Link { from, to } => {
                if let Some(&i) = self.names.get(from) {
                    self.names.insert(to.clone(), i);
                }
            }
            Step::Mkdir { path } => {
                self.dirs.insert(path.clone());
            }
        }
    }

    /// Content of `ino` with its first `writes` unsynced writes (and the
    /// truncations before them) applied, the last one cut to `cut` bytes.
    fn content(&self, ino: usize, upto: Option<(usize, Option<usize>)>) -> Vec<u8> {
        let node = &self.inodes[ino];
        let mut c = node.durable.clone();
        let Some((last, cut)) = upto else {
            return c;
        };
        for (k, (w, t)) in node.pending.iter().enumerate().take(last + 1) {
            if let Some(len) = t {
                c.resize(usize::try_from(*len).unwrap(), 0);
            }
            if let Some((at, data)) = w {
                let data = if k == last {
                    &data[..cut.unwrap_or(data.len()).min(data.len())]
                } else {
                    &data[..]
                };
                apply_write(&mut c, *at, data);
            }
        }
        c
    }

    /// The crash states after the steps applied so far.
    fn crash_states(&self) -> Vec<(Kind, State)> {
        let durable = |names: &BTreeMap<PathBuf, usize>| -> BTreeMap<PathBuf, Vec<u8>> {
            names
                .iter()
                .map(|(p, &i)| (p.clone(), self.content(i, None)))
                .collect()
        };
        let mut states = vec![
            (Kind::Durable, durable(&self.durable_names)),
            (Kind::Names, durable(&self.names)),
        ];
        // Prefixes of the unsynced writes, in order, the last one cut short
        // (and once whole, for the last prefix).
        for (n, &(ino, k)) in self.unsynced.iter().enumerate() {
            let whole = n + 1 == self.unsynced.len();
            for cut in [Some(true), whole.then_some(false)].into_iter().flatten() {
                let mut files = BTreeMap::new();
                for (p, &i) in &self.names {
                    // This file's last write in the prefix.
                    let last = self.unsynced[..=n]
                        .iter()
                        .filter(|(j, _)| *j == i)
                        .map(|(_, k)| *k)
                        .max();
                    let upto = last.map(|l| {
                        let len = self.inodes[i].pending[l]
                            .0
                            .as_ref()
                            .map_or(0, |w| w.1.len());
                        (l, (cut && i == ino && l == k).then_some(len / 2))
                    });
                    files.insert(p.clone(), self.content(i, upto));
                }
                states.push((Kind::Prefix, files));
            }
        }
        states
    }
}

fn step_name(step: &Step) -> String {
    match step {
        Step::Open { path, .. } => format!("open {}", path.display()),
        Step::Write { fd, data, .. } => format!("write fd {fd} {} bytes", data.len()),
        Step::Sync { fd } => format!("sync fd {fd}"),
        Step::Rename { to, .. } => format!("rename to {}", to.display()),
        other => format!("{other:?}").chars().take(60).collect(),
    }
}

fn step_is_plain_write(step: &Step) -> bool {
    matches!(step, Step::Write { at: None, .. })
}

/// Writes a crash state under `dest`, in place of the state dir at `root`.
fn materialise(model: &Model, files: &BTreeMap<PathBuf, Vec<u8>>, root: &Path, dest: &Path) {
    let moved = |p: &Path| dest.join(p.strip_prefix(root).unwrap());
    for d in &model.dirs {
        if d.starts_with(root) {
            fs::create_dir_all(moved(d)).unwrap();
        }
    }
    for (p, bytes) in files {
        if p.starts_with(root) {
            fs::create_dir_all(moved(p.parent().unwrap())).unwrap();
            fs::write(moved(p), bytes).unwrap();
        }
    }
}

fn strace_available() -> bool {
    Command::new("strace")
        .arg("-V")
        .output()
        .is_ok_and(|o| o.status.success())
}

/// The store's background flush intervals each record is taken with:
/// sled's default, and one of 1 ms, so that the flusher also makes writes
/// durable between the process's own steps (as on a slow or loaded
/// machine, where the default interval ends mid-command).
const FLUSHERS: [Option<u64>; 2] = [None, Some(1)];

/// Runs tidegate `args` on `env` under strace, with the store's background
/// flush every `flush_ms` when given; returns the parsed steps.
fn traced(env: &Env, args: &[&str], flush_ms: Option<u64>) -> Vec<Step> {
    let trace = env.state().parent().unwrap().join("trace.txt");
    let mut cmd = Command::new("strace");
    cmd.args(["-f", "-y", "-qq", "-xx", "-s", "100000000", "-o"])
        .arg(&trace)
        .args(["-e", &format!("trace={TRACED}")])
        .arg(env!("CARGO_BIN_EXE_tidegate"))
        .arg("--state")
        .arg(env.state())
        .args(args)
        .env_remove("TIDEGATE_STATE")
        .env("USER", "tester");
    if let Some(ms) = flush_ms {
        cmd.env("TIDEGATE_FAILPOINTS", format!("store:flush-every={ms}"));
    }
    let out = cmd.output().unwrap();
    assert!(out.status.success(), "{}", stderr(&out));
    parse_trace(&fs::read_to_string(&trace).unwrap(), &env.state())
}

/// The states to explore: every distinct state, then an even spread of at
/// most the CI bound.
fn explore(start: &Model, steps: &[Step]) -> Option<(Vec<(Kind, State)>, usize)> {
    let mut model = start.clone();
    let mut seen = BTreeSet::new();
    let mut states = Vec::new();
    for step in steps {
        model.apply(step);
        for (kind, s) in model.crash_states() {
            let mut h = std::collections::hash_map::DefaultHasher::new();
            s.hash(&mut h);
            if seen.insert(h.finish()) {
                if std::env::var("TIDEGATE_POWERLOSS_DEBUG").is_ok() {
                    let last = model
                        .unsynced
                        .iter()
                        .map(|(i, _)| {
                            model
                                .names
                                .iter()
                                .find(|(_, j)| *j == i)
                                .map(|(p, _)| p.file_name().unwrap().to_string_lossy().to_string())
                                .unwrap_or_default()
                        })
                        .collect::<Vec<_>>();
                    eprintln!(
                        "state {}: {kind:?} after {:?}; unsynced {:?}",
                        states.len(),
                        step_name(step),
                        last
                    );
                }
                states.push((kind, s));
            }
        }
    }
    let distinct = states.len();
    // The replay must end where the real run ended: every file's content
    // as the process left it.
    // The record orders two threads' overlapping writes by when strace saw
    // them, which rarely differs from the kernel's order: then record again.
    for (p, &i) in &model.names {
        let on_disk = fs::read(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
        if on_disk != model.inodes[i].volatile {
            eprintln!(
                "the replay of {} differs from the file; recording again",
                p.display()
            );
            return None;
        }
    }
    let bound: usize = std::env::var("TIDEGATE_POWERLOSS_STATES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(40);
    if bound > 0 && states.len() > bound {
        let stride = states.len() as f64 / bound as f64;
        states = (0..bound)
            .map(|k| states[(k as f64 * stride) as usize].clone())
            .collect();
    }
    Some((states, distinct))
}

/// Fails on any violation, in every kind of crash state.
fn judge(violations: &[(Kind, String)]) {
    for (_, v) in violations {
        eprintln!("violation: {v}");
    }
    let failing: Vec<&String> = violations.iter().map(|(_, v)| v).collect();
    assert!(failing.is_empty(), "{failing:#?}");
}

fn skip_without_strace() -> bool {
    if strace_available() {
        return false;
    }
    assert!(
        std::env::var("CI").as_deref() != Ok("true"),
        "strace is required in CI (.ci/run installs it)"
    );
    eprintln!("skipped: strace is not installed");
    true
}

/// An `Env` whose state dir is `dir/state` (a crash state).
fn env_at(dir: tempfile::TempDir) -> Env {
    Env { dir }
}

#[test]
fn power_loss_while_accepting_a_batch_loses_and_doubles_no_row() {
    if skip_without_strace() {
        return;
    }
    for flush_ms in FLUSHERS {
        accepting_a_batch(flush_ms);
    }
}

fn accepting_a_batch(flush_ms: Option<u64>) {
    let file = |env: &Env| env.state().parent().unwrap().join("rows-1.csv");
    crash_states_of(
        "accepting a batch",
        flush_ms,
        |env| {
            let first = env.state().parent().unwrap().join("rows-0.csv");
            fs::write(&first, tiny_rows(0, 200)).unwrap();
            assert_eq!(code(&env.ingest(std::slice::from_ref(&first))), 0);
            fs::write(file(env), tiny_rows(200, 150)).unwrap();
            vec!["ingest".into(), file(env).to_str().unwrap().into()]
        },
        |_| {},
        |env, crashed| {
            // The owner's start recovers; taking the file again is the
            // producer's retry. Then every row is there once.
            let out = crashed.ingest(&[file(env)]);
            let rows = (code(&out) == 0).then(|| crashed.status_json()["summary"]["rows"].clone());
            let check = crashed.run(&["verify"]);
            let verified = code(&check) == 0;
            (rows != Some(serde_json::json!(350)) || !verified).then(|| {
                format!(
                    "ingest exit {} ({}), rows {rows:?}, verify {verified} ({})",
                    code(&out),
                    stderr(&out).trim(),
                    stderr(&check).trim()
                )
            })
        },
    );
}

/// Records `tidegate ARGS` (what `setup` returns, on the state dir it
/// prepared) under strace, asks `after` about the real run, records again
/// when the replay does not end where the run did; then opens each crash
/// state and asks `check` (given
/// the recorded env and the crashed one) what is wrong with it, if
/// anything. Prints the figures and fails on any violation.
fn crash_states_of(
    what: &str,
    flush_ms: Option<u64>,
    setup: impl Fn(&Env) -> Vec<String>,
    after: impl Fn(&Env),
    check: impl Fn(&Env, &Env) -> Option<String>,
) {
    let mut attempt = 0;
    // The recorded env lives to the end: the input files are in it.
    let (env, before, steps, states, distinct) = loop {
        attempt += 1;
        let env = Env::with_config_text(crate::support::TINY_CONFIG);
        let args = setup(&env);
        let before = Model::load(&env.state());
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let steps = traced(&env, &args, flush_ms);
        after(&env);
        match explore(&before, &steps) {
            Some((states, distinct)) => break (env, before, steps, states, distinct),
            None => assert!(attempt < 3, "the replay never matched the real run"),
        }
    };
    let root = env.state();
    let mut violations = Vec::new();
    for (n, (kind, files)) in states.iter().enumerate() {
        let dir = tempfile::tempdir().unwrap();
        materialise(&before, files, &root, &dir.path().join("state"));
        let crashed = env_at(dir);
        if let Some(problem) = check(&env, &crashed) {
            violations.push((*kind, format!("state {n} ({kind:?}): {problem}")));
        }
    }
    eprintln!(
        "power loss while {what} (store flush every {flush_ms:?} ms): {} recorded steps, {distinct} distinct states, {} explored, {} violations",
        steps.len(),
        states.len(),
        violations.len()
    );
    judge(&violations);
}

#[test]
fn power_loss_while_promoting_a_model_leaves_the_old_or_the_new_one_serving() {
    if skip_without_strace() {
        return;
    }
    for flush_ms in FLUSHERS {
        promoting_a_model(flush_ms);
    }
}

fn promoting_a_model(flush_ms: Option<u64>) {
    let file = |env: &Env, i: usize| env.state().parent().unwrap().join(format!("rows-{i}.csv"));
    crash_states_of(
        "promoting a model",
        flush_ms,
        |env| {
            let files: Vec<_> = (0..3)
                .map(|i| {
                    fs::write(file(env, i), tiny_rows(i * 200, 200)).unwrap();
                    file(env, i)
                })
                .collect();
            assert_eq!(code(&env.ingest(&files)), 0);
            vec!["retrain".into()]
        },
        |env| {
            assert_eq!(
                env.status_json()["summary"]["serving"],
                1,
                "the cycle promoted"
            )
        },
        |env, crashed| {
            // Any owner's start recovers (here: a file already stored).
            let out = crashed.ingest(&[file(env, 0)]);
            let status = (code(&out) == 0).then(|| crashed.status_json());
            let verify = crashed.run(&["verify"]);
            let ok = status.as_ref().is_some_and(|s| {
                s["summary"]["rows"] == 600
                    && (s["summary"]["serving"].is_null() || s["summary"]["serving"] == 1)
            }) && code(&verify) == 0;
            (!ok).then(|| {
                format!(
                    "start exit {} ({}), status {:?}, verify {}: {}",
                    code(&out),
                    stderr(&out).trim(),
                    status.map(|s| s["summary"].clone()),
                    code(&verify),
                    stdout(&verify).trim()
                )
            })
        },
    );
}

#[test]
fn the_trace_parser_reads_a_call_that_another_thread_interrupted() {
    let root = Path::new("/s");
    let text = "7 fsync(5</s/a> <unfinished ...>\n\
                8 write(4</s/b>, \"\\x61\", 1) = 1\n\
                7 <... fsync resumed>)              = 0\n";
    let steps = parse_trace(text, root);
    assert_eq!(steps.len(), 2, "{steps:?}");
    assert!(matches!(steps[1], Step::Sync { fd: 5 }), "{steps:?}");
    assert_eq!(
        split_result("4</s/b>, \"x\", 1)   = 1"),
        Some(("4</s/b>, \"x\", 1", "1"))
    );
}
