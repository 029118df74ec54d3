//! Crash atomicity of ingest: real `tidegate ingest` processes are killed
//! with SIGKILL at random moments, then a final run finishes the job. Every
//! file must end up stored exactly once and whole, and the audit log in the
//! store and in `audit.jsonl` must form one intact chain.

use std::collections::BTreeSet;
use std::fs;
use std::path::PathBuf;
use std::time::Duration;

use tidegate::audit::verify_chain;
use tidegate::config::Config;
use tidegate::rng::Rng;
use tidegate::state::{self, StateDir};
use tidegate::store::Split;

use crate::support::{Env, data};

const FILES: usize = 45;
const ROWS_PER_FILE: usize = 40;
/// Ingest kills in CI; `TIDEGATE_SOAK_KILLS` raises it (`ops/crash-soak.sh`).
const KILLS: usize = 30;

/// Files whose rows carry unique ids 0.. (the `id` column).
fn make_files(dir: &std::path::Path) -> Vec<PathBuf> {
    let mut rng = Rng::new(99);
    (0..FILES)
        .map(|f| {
            let mut text = String::from("id,city,temp,flag,y\n");
            for r in 0..ROWS_PER_FILE {
                let id = f * ROWS_PER_FILE + r;
                let city = ["Oslo", "Lima", "Rome", "Pune"][rng.below(4)];
                text.push_str(&format!(
                    "{id},{city},{:.1},{},{:.2}\n",
                    rng.uniform() * 40.0 - 10.0,
                    if rng.below(3) == 0 { "" } else { "x" },
                    rng.normal() * 5.0
                ));
            }
            let p = dir.join(format!("f{f:03}.csv"));
            fs::write(&p, text).unwrap();
            p
        })
        .collect()
}

#[test]
fn killed_ingests_never_lose_or_double_rows() {
    let env = Env::new(&data("small.toml"));
    let files = make_files(env.dir.path());
    let mut rng = Rng::new(2026);
    let kills = crate::support::soak_kills(KILLS);
    let started = std::time::Instant::now();
    let mut killed = 0;
    for i in 0..kills {
        // Each run is handed a few files so kills land between and inside them.
        let start = rng.below(FILES);
        let chosen: Vec<&PathBuf> = (0..3).map(|k| &files[(start + k * 7) % FILES]).collect();
        let mut child = env
            .command()
            .arg("-q")
            .arg("ingest")
            .args(&chosen)
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap();
        // Kill at a random moment in the first ~25 ms: start-up, recovery,
        // parsing, inside the store transaction, the fsyncs, archiving.
        std::thread::sleep(Duration::from_micros(
            rng.below(25_000) as u64 + (i % 3) as u64 * 500,
        ));
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap();
            killed += 1;
        }
        child.wait().unwrap();
    }
    assert!(
        killed > kills / 3,
        "only {killed} of {kills} runs were killed mid-way; the timing is off"
    );
    // A clean run over every file finishes what was interrupted.
    let out = env.ingest(&files);
    if !out.status.success() {
        let kept = env.dir.keep();
        panic!(
            "the final ingest failed (state kept in {} for a look): {}",
            kept.display(),
            String::from_utf8_lossy(&out.stderr)
        );
    }

    let verified = env.run(&["verify"]);
    assert!(
        verified.status.success(),
        "verify after the kills: {}",
        String::from_utf8_lossy(&verified.stdout)
    );
    let sd = StateDir::new(env.state());
    // Read what the finished run left before opening the store again (the
    // owner's start-up recovery would otherwise tidy up after a bug).
    // Nothing half-written is left behind.
    for dir in [sd.root().to_path_buf(), sd.archive(), sd.refused()] {
        for e in fs::read_dir(&dir).unwrap() {
            let name = e.unwrap().file_name().to_string_lossy().into_owned();
            assert!(
                !name.starts_with(".tidegate-tmp-") && !name.starts_with(".pending-"),
                "{name} left in {}",
                dir.display()
            );
        }
    }
    let mirrored = sd.mirror().read_lines().unwrap();
    let config = Config::load(&data("small.toml")).unwrap();
    let (owner, _) = state::open(&sd, &config).unwrap();
    let store = &owner.store;
    let batches = store.batches().unwrap();
    assert_eq!(batches.len(), FILES, "every file stored exactly once");
    let id_col = store.schema().index_of("id").unwrap();
    let mut ids = BTreeSet::new();
    let mut total = 0;
    // Every stored row counts, also those of a batch the suspect-batch
    // check set aside (with pure-noise targets and a store of a few
    // batches, a chance fit can make a batch look unrelated): set aside is
    // stored, and a crash must neither lose nor double it.
    for b in &batches {
        for split in [Split::Train, Split::Holdout] {
            let rows = store.batch_rows(split, b.id).unwrap();
            total += rows.n_rows();
            for r in 0..rows.n_rows() {
                ids.insert(rows.number(r, id_col).unwrap() as usize);
            }
        }
    }
    let aside = batches.iter().filter(|b| b.is_set_aside()).count();
    println!(
        "ingest kill loop: {kills} runs in {:.1} s, {killed} killed mid-way; files {FILES}, \
         batches stored {} ({aside} set aside); rows published {}, stored {total}, distinct ids {}",
        started.elapsed().as_secs_f64(),
        batches.len(),
        FILES * ROWS_PER_FILE,
        ids.len()
    );
    assert_eq!(total, FILES * ROWS_PER_FILE, "no row lost or doubled");
    assert_eq!(ids, (0..FILES * ROWS_PER_FILE).collect::<BTreeSet<_>>());
    for b in &batches {
        assert_eq!(b.rows() as usize, ROWS_PER_FILE, "batch {} is whole", b.id);
        let archived = fs::read(sd.archive().join(format!("{}.csv", b.id))).unwrap();
        assert_eq!(
            blake3::hash(&archived).to_hex().to_string(),
            b.hash,
            "archive of {} holds its bytes",
            b.id
        );
    }
    // The store's audit tree and audit.jsonl are the same intact chain.
    let stored: Vec<Vec<u8>> = store
        .audit_entries()
        .unwrap()
        .into_iter()
        .map(|(_, l)| l)
        .collect();
    assert_eq!(stored, mirrored);
    let entries = verify_chain(mirrored.iter().map(Vec::as_slice)).unwrap();
    let accepted = entries
        .iter()
        .filter(|e| e.event.kind() == "batch-accepted")
        .count();
    assert_eq!(accepted, FILES);
}
