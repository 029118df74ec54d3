//! The decision rules on simulated streams with shared day effects, through
//! the real intake, fresh-data check and cycle. The short runs are part of
//! the suite; `error_rates_table` (ignored) prints the README's table:
//! `cargo test --release --lib sim::tests::error_rates_table -- --ignored --nocapture`.

use super::*;

#[test]
fn a_stationary_stream_raises_few_flags_and_no_rollback() {
    let dir = tempfile::tempdir().unwrap();
    let nights = run_stream(dir.path(), &StreamSpec::stationary(1, 21)).unwrap();
    let mut t = Tally::default();
    t.add(&nights);
    assert_eq!(t.rollbacks, 0, "{nights:?}");
    assert!(t.promotions >= 1, "a first model serves: {nights:?}");
    assert!(
        t.fresh_flags * 10 <= t.nights,
        "{} fresh flags on {} nights",
        t.fresh_flags,
        t.nights
    );
}

/// Nights after a model made `factor` times worse starts serving until
/// it is rolled back (`None`: not within `limit`).
fn nights_to_rollback(seed: u64, factor: f64, limit: usize) -> Option<usize> {
    let dir = tempfile::tempdir().unwrap();
    let spec = StreamSpec::stationary(seed, 14 + limit);
    let files = stream(&spec);
    let mut run = Run::new(dir.path()).unwrap();
    for (i, (name, text)) in files.iter().take(14).enumerate() {
        run.night(i + 1, name, text, true).unwrap();
    }
    make_worse(&mut run.owner, factor, "sim").unwrap();
    for (k, (name, text)) in files.iter().skip(14).enumerate() {
        let n = run.night(15 + k, name, text, false).unwrap();
        if std::env::var_os("SIM_DEBUG").is_some() {
            let log = run.owner.store.audit_entries().unwrap();
            let last = String::from_utf8_lossy(&log.last().unwrap().1).to_string();
            eprintln!(
                "night {}: {} {}",
                15 + k,
                n.verdict,
                &last[..last.len().min(1500)]
            );
        }
        if n.rolled_back {
            return Some(k + 1);
        }
    }
    None
}

#[test]
#[ignore = "measurement: end to end the monitor does not yet catch this within 8 batches (see README)"]
fn a_model_made_worse_is_rolled_back() {
    let n = nights_to_rollback(2, 1.25, 8);
    println!("rolled back after {n:?} batches");
    assert!(n.is_some());
}

/// Nights from a zone's change until the fresh-data check flags a shift.
fn nights_to_shift_flag(seed: u64, factor: f64) -> Option<usize> {
    let dir = tempfile::tempdir().unwrap();
    let spec = StreamSpec {
        change: Change::ZoneShift {
            night: 15,
            zone: (seed % 6) as usize,
            factor,
        },
        ..StreamSpec::stationary(seed, 20)
    };
    let nights = run_stream(dir.path(), &spec).unwrap();
    nights[14..]
        .iter()
        .position(|n| n.verdict == "shifted")
        .map(|p| p + 1)
}

/// A short version of the table's power row: most of a few streams flag
/// the zone within 2 nights (18 of 20 in the table; at least 3 of 5 here,
/// a property that a better default does not break).
#[test]
fn a_zone_whose_demand_rises_by_45_percent_is_flagged() {
    let nights: Vec<Option<usize>> = (0..5)
        .map(|s| nights_to_shift_flag(300 + s, 1.45))
        .collect();
    println!("flagged after {nights:?} batches");
    let within2 = nights.iter().filter(|n| n.is_some_and(|n| n <= 2)).count();
    assert!(within2 >= 3, "{nights:?}");
}

#[test]
#[ignore = "long: prints the error-rate table of the README"]
fn error_rates_table() {
    use crate::gate::simulate;
    let mut t = Tally::default();
    let mut per_stream_rollbacks = Vec::new();
    for seed in 0..10 {
        let dir = tempfile::tempdir().unwrap();
        let nights = run_stream(dir.path(), &StreamSpec::stationary(100 + seed, 26)).unwrap();
        per_stream_rollbacks.push(nights.iter().filter(|n| n.rolled_back).count());
        t.add(&nights);
    }
    let runs = 20;
    let caught: Vec<Option<usize>> = (0..runs)
        .map(|s| nights_to_rollback(200 + s, 1.25, 6))
        .collect();
    let within3 = caught.iter().filter(|c| c.is_some_and(|n| n <= 3)).count();
    let shifts: Vec<Option<usize>> = (0..runs)
        .map(|s| nights_to_shift_flag(300 + s, 1.45))
        .collect();
    let within2 = shifts.iter().filter(|c| c.is_some_and(|n| n <= 2)).count();
    let fp1 = simulate::promotion_rate(4_000, 10, 1, &simulate::equal(1), true);
    let fp2 = simulate::promotion_rate(4_000, 10, 2, &simulate::equal(2), true);
    let naive = simulate::promotion_rate(4_000, 10, 3, &simulate::equal(1), false);
    let to_promote = simulate::batches_to_promote(0.1, 0.8, 400, 60);
    println!("| measure | result |");
    println!("|---|---|");
    println!(
        "| automatic rollbacks, 10 stationary streams of 26 nights | {} in all (per stream {:?}) |",
        t.rollbacks, per_stream_rollbacks
    );
    println!(
        "| fresh-check flags (shifted or regressed) per night | {}/{} = {:.1}% |",
        t.fresh_flags,
        t.nights,
        100.0 * t.fresh_flags as f64 / t.nights as f64
    );
    println!(
        "| drift flags per night | {}/{} = {:.1}% |",
        t.drift_nights,
        t.nights,
        100.0 * t.drift_nights as f64 / t.nights as f64
    );
    println!(
        "| nights with any flag | {}/{} = {:.1}% |",
        t.any_flag_nights,
        t.nights,
        100.0 * t.any_flag_nights as f64 / t.nights as f64
    );
    println!("| promotions over those streams | {} |", t.promotions);
    for (c, nights) in &t.drift_columns {
        println!(
            "| drift flags on `{c}` (nights) | {} {nights:?} |",
            nights.len()
        );
    }
    println!(
        "| false promotions per cycle, 1 candidate (gate, 10 batches) | {:.2}% |",
        100.0 * fp1
    );
    println!(
        "| false promotions per cycle, 2 candidates (Holm) | {:.2}% |",
        100.0 * fp2
    );
    println!(
        "| same, rows counted as independent (the old rule) | {:.2}% |",
        100.0 * naive
    );
    println!(
        "| model 25% worse rolled back within 3 batches | {within3}/{runs} (nights: {caught:?}) |"
    );
    println!(
        "| +45% in one zone flagged within 2 batches | {within2}/{runs} (nights: {shifts:?}) |"
    );
    println!(
        "| true 10% gain promoted in ≥ 80% of runs from | {to_promote:?} holdout batches of 30 rows |"
    );
}

/// Drift flags per night on stationary streams, through the real intake
/// only (drift is judged at intake, before any model):
/// `cargo test --release --lib sim::tests::drift_flags_per_night -- --ignored --nocapture`
#[test]
#[ignore = "measurement: prints drift flags per night on stationary streams"]
fn drift_flags_per_night() {
    let mut flagged = 0;
    let mut nights = 0;
    let mut columns: std::collections::BTreeMap<String, Vec<usize>> = Default::default();
    for seed in 0..20 {
        let dir = tempfile::tempdir().unwrap();
        let mut run = Run::new(dir.path()).unwrap();
        let spec = StreamSpec {
            day_sd: [0.06, 0.12, 0.2][seed as usize % 3],
            ..StreamSpec::stationary(500 + seed, 26)
        };
        for (i, (name, text)) in stream(&spec).iter().enumerate() {
            let n = run.night(i + 1, name, text, false).unwrap();
            nights += 1;
            flagged += usize::from(!n.drift_flagged.is_empty());
            for c in n.drift_flagged {
                columns.entry(c).or_default().push(i + 1);
            }
        }
    }
    println!(
        "drift flags: {flagged}/{nights} nights = {:.1}%",
        100.0 * flagged as f64 / nights as f64
    );
    for (c, n) in columns {
        println!("  {c}: {} {n:?}", n.len());
    }
}

/// Flags and rollbacks on stationary streams unlike the table's: fewer
/// rows a night and larger or smaller day effects, end to end:
/// `cargo test --release --lib sim::tests::stationary_variants -- --ignored --nocapture`
#[test]
#[ignore = "measurement: prints flags on other stationary streams"]
fn stationary_variants() {
    for (buildings, meters, day_sd) in [(12, 4, 0.25), (38, 4, 0.05), (20, 2, 0.15)] {
        let mut t = Tally::default();
        for seed in 0..5 {
            let dir = tempfile::tempdir().unwrap();
            let spec = StreamSpec {
                buildings,
                meters,
                day_sd,
                ..StreamSpec::stationary(900 + seed, 26)
            };
            t.add(&run_stream(dir.path(), &spec).unwrap());
        }
        println!(
            "{} rows a night, day sd {day_sd}: rollbacks {}, fresh flags {}/{}, drift nights {}/{}, promotions {}",
            buildings * meters,
            t.rollbacks,
            t.fresh_flags,
            t.nights,
            t.drift_nights,
            t.nights,
            t.promotions
        );
    }
}
