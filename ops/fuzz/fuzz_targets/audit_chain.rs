//! Arbitrary bytes as the contents of `audit.jsonl`: split into lines the
//! way the log reader does, each line parsed as an entry, and the whole
//! checked as a hash chain. Any panic is a bug: a damaged log must come back
//! as a problem naming the first bad entry.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tidegate::audit::{Entry, verify_chain};

fuzz_target!(|data: &[u8]| {
    let complete = data.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
    let lines: Vec<&[u8]> = data[..complete]
        .split(|&b| b == b'\n')
        .filter(|l| !l.is_empty())
        .collect();
    for line in &lines {
        if let Ok(entry) = Entry::from_line(line) {
            // What the log and the report show of every entry.
            let _ = entry.line();
            let _ = entry.event.kind();
            let _ = entry.timestamp();
        }
    }
    match verify_chain(lines.iter().copied()) {
        Ok(entries) => assert_eq!(entries.len(), lines.len()),
        Err(problem) => {
            assert!(problem.seq >= 1 && problem.seq as usize <= lines.len());
            let _ = problem.to_string();
        }
    }
});
