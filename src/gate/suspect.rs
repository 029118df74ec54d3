//! Is an accepted batch's data broken, rather than the world changed? The
//! judgements behind setting a batch aside before anything trains on it.
//! Pure: losses and summary figures in, verdicts out.
//!
//! - [`judge_pairing`]: do the batch's targets still go with its inputs? A
//!   reference model (the serving model, its predecessor, a ridge fit on
//!   the stored training rows) predicts each row; its loss with the rows'
//!   own targets is compared with its loss when the batch's targets are
//!   shuffled among the batch's rows. The share of that loss the pairing
//!   explains, `explained = 1 − actual / shuffled`, is what a broken join
//!   destroys (it falls to about 0) and what a real change of the world
//!   keeps: a town selling 45% more still sells more where the inputs say
//!   a shop is large. A day effect that moves every target alike adds the
//!   same amount to both losses, so it moves the share little. The batch is
//!   judged against the share the same reference shows on earlier batches
//!   (their median, batch by batch, so the usual day-to-day spread is in
//!   it): it is unrelated when its share is at most half the usual one and
//!   a one-sided t-test on its rows says it is below half with p ≤ alpha,
//!   and the reference does worse on it than on the stored holdout rows.
//!   The test on the batch's own rows asks about this batch alone, so its
//!   rows are the population; the day's shared conditions are the thing
//!   being judged, not a nuisance.
//! - [`judge_scale`]: a target whose size jumped (a unit change, ×1000): the
//!   batch's root mean square of the target against the stored rows', far
//!   outside the ratios earlier batches showed.
//! - [`judge_copies`]: a batch that is mostly one row repeated (an export
//!   stuck on a row): the share of the batch's most common row, far above
//!   the share earlier batches showed.
//! - [`judge`]: the batch is suspect when any of the three says so; for the
//!   pairing, only when every reference that can tell says unrelated.

use super::dist::t_sf;
use super::show;

/// Fewest rows of a batch a pairing judgement is made on.
pub const MIN_ROWS: usize = 8;
/// A reference that explains less than this share of the loss on usual
/// batches cannot tell related targets from unrelated ones (design choice:
/// below a tenth the halved share is lost in the sampling noise).
pub const MIN_USUAL_EXPLAINED: f64 = 0.1;
/// A batch is unrelated only when its explained share is at most this
/// fraction of the usual one (design choice: a real change of the world
/// that costs more than half of what the inputs explain would also be
/// worth an operator's look before training on it).
pub const KEEP_FRACTION: f64 = 0.5;
/// A target's root mean square must differ from the stored rows' by at
/// least this factor beyond the largest ratio earlier batches showed (a
/// unit change is a power of ten; common practice, no source).
pub const SCALE_FACTOR: f64 = 10.0;
/// A batch is mostly copies when its most common row is at least this
/// share of its rows (design choice)…
pub const COPIES_SHARE: f64 = 0.5;
/// …and at least this many times the largest share earlier batches showed.
pub const COPIES_FACTOR: f64 = 4.0;
/// Fewest rows of a batch the copies check judges.
pub const COPIES_MIN_ROWS: usize = 10;

/// One reference model's per-row losses on the batch.
#[derive(Debug, Clone, PartialEq)]
pub struct PairingInput {
    pub name: String,
    /// Loss of each row with its own target.
    pub actual: Vec<f64>,
    /// Loss of each row with targets shuffled among the batch's rows
    /// (averaged over a few shuffles).
    pub shuffled: Vec<f64>,
    /// The reference's mean loss on the stored holdout rows.
    pub holdout_loss: Option<f64>,
    /// The explained share of earlier batches, one value per batch.
    pub history: Vec<f64>,
}

/// What one reference says about the batch.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pairing {
    /// The targets go with the inputs about as usual.
    Related,
    /// The targets have lost most of their relation to the inputs.
    Unrelated,
    /// This reference cannot tell (too few rows, too little explained).
    CannotTell,
}

impl Pairing {
    pub fn name(self) -> &'static str {
        match self {
            Pairing::Related => "related",
            Pairing::Unrelated => "unrelated",
            Pairing::CannotTell => "cannot-tell",
        }
    }
}

/// The pairing judgement of one reference, with its figures.
#[derive(Debug, Clone, PartialEq)]
pub struct PairingCheck {
    pub name: String,
    pub verdict: Pairing,
    pub rows: usize,
    /// ln(mean batch loss / mean holdout loss).
    pub level: Option<f64>,
    pub explained: Option<f64>,
    /// Median explained share of earlier batches.
    pub usual: Option<f64>,
    pub history: usize,
    /// One-sided p of "explained share below half the usual one".
    pub p: Option<f64>,
    pub reason: String,
}

/// The share of the shuffled-target loss that the rows' own targets save:
/// `1 − Σ actual / Σ shuffled`. `None` when the shuffled loss is not > 0.
pub fn explained(actual: &[f64], shuffled: &[f64]) -> Option<f64> {
    let a: f64 = actual.iter().sum();
    let s: f64 = shuffled.iter().sum();
    (s > 0.0 && s.is_finite() && a.is_finite()).then(|| 1.0 - a / s)
}

fn median(values: &[f64]) -> Option<f64> {
    let mut v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    Some(if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    })
}

/// Judges one reference (see the module notes).
pub fn judge_pairing(input: &PairingInput, alpha: f64) -> PairingCheck {
    let n = input.actual.len().min(input.shuffled.len());
    let mean = |v: &[f64]| v[..n].iter().sum::<f64>() / n.max(1) as f64;
    let level = input
        .holdout_loss
        .filter(|&h| h > 0.0 && n > 0)
        .map(|h| (mean(&input.actual) / h).ln())
        .filter(|l| l.is_finite());
    let explained = explained(&input.actual[..n], &input.shuffled[..n]);
    let usual = median(&input.history);
    let mut check = PairingCheck {
        name: input.name.clone(),
        verdict: Pairing::CannotTell,
        rows: n,
        level,
        explained,
        usual,
        history: input.history.len(),
        p: None,
        reason: String::new(),
    };
    let (Some(e), Some(u)) = (explained, usual) else {
        check.reason = format!(
            "{}: cannot tell ({})",
            input.name,
            if usual.is_none() {
                "no earlier batch to compare with"
            } else {
                "losses not finite"
            }
        );
        return check;
    };
    if n < MIN_ROWS {
        check.reason = format!("{}: cannot tell ({n} rows, {MIN_ROWS} needed)", input.name);
        return check;
    }
    if u < MIN_USUAL_EXPLAINED {
        check.reason = format!(
            "{}: cannot tell (its inputs usually explain {} of the loss, below {})",
            input.name,
            show(u),
            show(MIN_USUAL_EXPLAINED)
        );
        return check;
    }
    // g_i = (shuffled_i − actual_i) − bound · shuffled_i has mean ≥ 0 when
    // the explained share is at least `bound`; test mean(g) < 0.
    let bound = KEEP_FRACTION * u;
    let g: Vec<f64> = (0..n)
        .map(|i| (input.shuffled[i] - input.actual[i]) - bound * input.shuffled[i])
        .collect();
    let gm = g.iter().sum::<f64>() / n as f64;
    let var = g.iter().map(|x| (x - gm).powi(2)).sum::<f64>() / (n - 1) as f64;
    let se = (var / n as f64).sqrt();
    let p = if se > 0.0 {
        t_sf(-gm / se, (n - 1) as f64)
    } else if gm < 0.0 {
        0.0
    } else {
        1.0
    };
    check.p = Some(p);
    let worse = level.is_none_or(|l| l > 0.0);
    let unrelated = e <= bound && p <= alpha && worse;
    check.verdict = if unrelated {
        Pairing::Unrelated
    } else {
        Pairing::Related
    };
    check.reason = format!(
        "{}: the inputs explain {} of the loss on this batch against {} usually (median of {} \
         earlier batches); below half of it: p = {}{}{}",
        input.name,
        show(e),
        show(u),
        input.history.len(),
        show(p),
        level.map_or_else(String::new, |l| format!(
            "; loss level ln(batch / holdout) = {}",
            show(l)
        )),
        if unrelated { ": unrelated" } else { "" }
    );
    check
}

/// Outcome of the target-scale check.
#[derive(Debug, Clone, PartialEq)]
pub struct ScaleCheck {
    /// Batch target root mean square / stored rows' root mean square.
    pub ratio: f64,
    /// Largest |ln ratio| earlier batches showed.
    pub usual: f64,
    pub flagged: bool,
}

/// Root mean square of a column from its mean and population variance.
pub fn root_mean_square(mean: f64, population_variance: f64) -> f64 {
    (mean * mean + population_variance.max(0.0)).sqrt()
}

/// Judges a batch's target size against the stored rows' (`ratio`) and
/// earlier batches' ratios. `None` when the ratio is not a positive number.
pub fn judge_scale(ratio: f64, past: &[f64]) -> Option<ScaleCheck> {
    if !(ratio > 0.0 && ratio.is_finite()) {
        return None;
    }
    let usual = past
        .iter()
        .filter(|r| **r > 0.0 && r.is_finite())
        .map(|r| r.ln().abs())
        .fold(0.0, f64::max);
    Some(ScaleCheck {
        ratio,
        usual,
        flagged: ratio.ln().abs() >= usual + SCALE_FACTOR.ln(),
    })
}

/// Outcome of the copies check.
#[derive(Debug, Clone, PartialEq)]
pub struct CopiesCheck {
    /// Share of the batch's rows equal to its most common row.
    pub share: f64,
    /// Largest such share of earlier batches.
    pub usual: f64,
    pub flagged: bool,
}

/// Share of the most common key among `keys`.
pub fn modal_share<K: Ord>(keys: &[K]) -> f64 {
    if keys.is_empty() {
        return 0.0;
    }
    let mut counts = std::collections::BTreeMap::new();
    for k in keys {
        *counts.entry(k).or_insert(0usize) += 1;
    }
    *counts.values().max().expect("not empty") as f64 / keys.len() as f64
}

/// Judges a batch of `rows` rows whose most common row has `share`.
pub fn judge_copies(share: f64, rows: usize, past: &[f64]) -> CopiesCheck {
    let usual = past
        .iter()
        .copied()
        .filter(|s| s.is_finite())
        .fold(0.0, f64::max);
    CopiesCheck {
        share,
        usual,
        flagged: rows >= COPIES_MIN_ROWS && share >= COPIES_SHARE && share >= COPIES_FACTOR * usual,
    }
}

/// The batch's verdict from the three checks.
#[derive(Debug, Clone, PartialEq)]
pub struct Verdict {
    pub suspect: bool,
    /// What made it suspect, short (empty when it is not).
    pub why: Vec<String>,
}

pub fn judge(
    pairings: &[PairingCheck],
    scale: Option<&ScaleCheck>,
    copies: &CopiesCheck,
) -> Verdict {
    let mut why = Vec::new();
    let telling: Vec<&PairingCheck> = pairings
        .iter()
        .filter(|p| p.verdict != Pairing::CannotTell)
        .collect();
    if !telling.is_empty() && telling.iter().all(|p| p.verdict == Pairing::Unrelated) {
        why.push(format!(
            "targets unrelated to the inputs for every reference ({})",
            telling
                .iter()
                .map(|p| p.name.as_str())
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    if let Some(s) = scale.filter(|s| s.flagged) {
        why.push(format!(
            "target scale jumped: {}× the stored rows' size (earlier batches within {}×)",
            show(s.ratio),
            show(s.usual.exp())
        ));
    }
    if copies.flagged {
        why.push(format!(
            "{} of the rows are copies of one row (earlier batches at most {})",
            show(copies.share),
            show(copies.usual)
        ));
    }
    Verdict {
        suspect: !why.is_empty(),
        why,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    /// Losses of a linear predictor ŷ = x on rows y = x + noise, with the
    /// targets shuffled among the rows `shuffle_targets` times first.
    fn rows(n: usize, noise: f64, shift: f64, seed: u64) -> (Vec<f64>, Vec<f64>) {
        let mut rng = Rng::new(seed);
        let x: Vec<f64> = (0..n).map(|_| rng.normal() * 2.0).collect();
        let y: Vec<f64> = x
            .iter()
            .map(|xi| xi + shift + noise * rng.normal())
            .collect();
        (x, y)
    }

    fn pairing(x: &[f64], y: &[f64], history: Vec<f64>, seed: u64) -> PairingInput {
        let actual: Vec<f64> = x.iter().zip(y).map(|(a, b)| (a - b).powi(2)).collect();
        let mut rng = Rng::new(seed);
        let mut shuffled = vec![0.0; x.len()];
        for _ in 0..4 {
            let mut perm: Vec<usize> = (0..x.len()).collect();
            rng.shuffle(&mut perm);
            for (i, &j) in perm.iter().enumerate() {
                shuffled[i] += (x[i] - y[j]).powi(2) / 4.0;
            }
        }
        PairingInput {
            name: "ref".into(),
            actual,
            shuffled,
            holdout_loss: Some(1.0),
            history,
        }
    }

    #[test]
    fn explained_share_of_a_perfect_and_a_useless_predictor() {
        assert_eq!(explained(&[0.0, 0.0], &[2.0, 2.0]), Some(1.0));
        assert_eq!(explained(&[2.0, 2.0], &[2.0, 2.0]), Some(0.0));
        assert_eq!(explained(&[1.0], &[0.0]), None);
    }

    #[test]
    fn shuffled_targets_are_unrelated_and_a_shift_is_not() {
        // Usual batches: Var(x) = 4, noise 1, so about 0.8 is explained.
        let history = vec![0.78, 0.81, 0.8, 0.83, 0.79, 0.8];
        let (x, y) = rows(160, 1.0, 0.0, 1);
        let ok = judge_pairing(&pairing(&x, &y, history.clone(), 2), 0.01);
        assert_eq!(ok.verdict, Pairing::Related, "{}", ok.reason);

        // The same rows with targets shuffled among them (a broken join).
        let mut yb = y.clone();
        Rng::new(3).shuffle(&mut yb);
        let mut broken = pairing(&x, &yb, history.clone(), 4);
        broken.holdout_loss = Some(1.0);
        let bad = judge_pairing(&broken, 0.01);
        assert_eq!(bad.verdict, Pairing::Unrelated, "{}", bad.reason);
        assert!(bad.explained.unwrap() < 0.3);

        // Every target up by 45% of the spread, and a day's common shift:
        // worse, but the inputs still explain most of it.
        let (x, y) = rows(160, 1.0, 1.5, 5);
        let shifted = judge_pairing(&pairing(&x, &y, history, 6), 0.01);
        assert_eq!(shifted.verdict, Pairing::Related, "{}", shifted.reason);
    }

    #[test]
    fn a_reference_that_explains_little_cannot_tell() {
        let (x, y) = rows(160, 20.0, 0.0, 7);
        let c = judge_pairing(&pairing(&x, &y, vec![0.01, 0.02, 0.0, 0.03, 0.01], 8), 0.01);
        assert_eq!(c.verdict, Pairing::CannotTell);
        let c = judge_pairing(&pairing(&x, &y, Vec::new(), 8), 0.01);
        assert_eq!(c.verdict, Pairing::CannotTell);
    }

    #[test]
    fn few_shuffled_rows_are_not_enough_to_be_sure() {
        let (x, mut y) = rows(6, 1.0, 0.0, 9);
        y.reverse();
        let c = judge_pairing(&pairing(&x, &y, vec![0.8; 6], 10), 0.01);
        assert_eq!(c.verdict, Pairing::CannotTell);
    }

    #[test]
    fn unrelated_false_rate_on_ordinary_batches_stays_below_alpha() {
        // 400 ordinary batches with a common day shift of up to ±2 noise
        // units: none may be called unrelated far more often than alpha.
        let mut flagged = 0;
        let mut rng = Rng::new(11);
        let history: Vec<f64> = vec![0.8; 10];
        for b in 0..400 {
            let day = (rng.uniform() - 0.5) * 4.0;
            let (x, y) = rows(60, 1.0, day, 100 + b);
            if judge_pairing(&pairing(&x, &y, history.clone(), 900 + b), 0.01).verdict
                == Pairing::Unrelated
            {
                flagged += 1;
            }
        }
        assert!(
            flagged <= 4,
            "{flagged} of 400 ordinary batches called unrelated"
        );
    }

    #[test]
    fn scale_jump_is_flagged_and_usual_variation_is_not() {
        let past = [1.1, 0.9, 1.3, 0.8];
        assert!(judge_scale(1000.0, &past).unwrap().flagged);
        assert!(judge_scale(0.001, &past).unwrap().flagged);
        assert!(!judge_scale(1.5, &past).unwrap().flagged);
        // A stream whose batches already vary threefold needs 30×.
        assert!(!judge_scale(20.0, &[3.0, 0.4]).unwrap().flagged);
        assert!(judge_scale(40.0, &[3.0, 0.4]).unwrap().flagged);
        assert!(judge_scale(0.0, &past).is_none());
    }

    #[test]
    fn one_row_repeated_is_flagged_and_usual_repeats_are_not() {
        let keys: Vec<u32> = std::iter::repeat_n(7, 90).chain(100..110).collect();
        let share = modal_share(&keys);
        assert!((share - 0.9).abs() < 1e-12);
        assert!(judge_copies(share, 100, &[0.01, 0.02]).flagged);
        // A stream where most rows repeat anyway.
        assert!(!judge_copies(share, 100, &[0.6]).flagged);
        assert!(!judge_copies(0.3, 100, &[0.01]).flagged);
        assert!(!judge_copies(1.0, 5, &[0.01]).flagged);
    }

    #[test]
    fn suspect_only_when_every_telling_reference_agrees() {
        let check = |name: &str, verdict| PairingCheck {
            name: name.into(),
            verdict,
            rows: 100,
            level: None,
            explained: None,
            usual: None,
            history: 0,
            p: None,
            reason: String::new(),
        };
        let copies = judge_copies(0.01, 100, &[]);
        let both = [
            check("serving", Pairing::Unrelated),
            check("ridge", Pairing::Unrelated),
        ];
        assert!(judge(&both, None, &copies).suspect);
        let split = [
            check("serving", Pairing::Unrelated),
            check("ridge", Pairing::Related),
        ];
        assert!(!judge(&split, None, &copies).suspect);
        let one = [
            check("serving", Pairing::CannotTell),
            check("ridge", Pairing::Unrelated),
        ];
        assert!(judge(&one, None, &copies).suspect);
        let none = [check("ridge", Pairing::CannotTell)];
        assert!(!judge(&none, None, &copies).suspect);
    }

    /// One simulated nightly batch: y = 10 + 3·x1 + 2·x2 + noise (the
    /// inputs explain about half), times a day factor 1 ± 12% shared by
    /// every row, x2 a day-level temperature plus row spread. The reference
    /// predicts from the inputs without knowing the day.
    fn sim_batch(rng: &mut Rng, n: usize) -> (Vec<[f64; 2]>, Vec<f64>) {
        let day = 1.0 + 0.12 * rng.normal();
        let temp = rng.normal();
        let x: Vec<[f64; 2]> = (0..n)
            .map(|_| [rng.normal(), temp + 0.5 * rng.normal()])
            .collect();
        let y = x
            .iter()
            .map(|v| day * (10.0 + 3.0 * v[0] + 2.0 * v[1]) + 3.6 * rng.normal())
            .collect();
        (x, y)
    }

    fn sim_losses(x: &[[f64; 2]], y: &[f64], rng: &mut Rng) -> (Vec<f64>, Vec<f64>) {
        let pred: Vec<f64> = x.iter().map(|v| 10.0 + 3.0 * v[0] + 2.0 * v[1]).collect();
        let actual = pred.iter().zip(y).map(|(p, t)| (p - t).powi(2)).collect();
        let mut shuffled = vec![0.0; y.len()];
        for _ in 0..4 {
            let mut perm: Vec<usize> = (0..y.len()).collect();
            rng.shuffle(&mut perm);
            for (i, &j) in perm.iter().enumerate() {
                shuffled[i] += (pred[i] - y[j]).powi(2) / 4.0;
            }
        }
        (actual, shuffled)
    }

    fn rms(y: &[f64]) -> f64 {
        (y.iter().map(|v| v * v).sum::<f64>() / y.len() as f64).sqrt()
    }

    /// (false set-aside rate on ordinary batches, catch rate of shuffled
    /// targets, of ×1000, of one row repeated) over `streams` seeded
    /// streams of 20 ordinary nights of `n` rows, the history taken from
    /// each earlier night's holdout fifth, then one faulty night of each kind.
    fn sim_rates(streams: u64, n: usize, alpha: f64) -> (f64, f64, f64, f64) {
        let (mut ordinary, mut false_flags) = (0usize, 0usize);
        let mut caught = [0usize; 3];
        for s in 0..streams {
            let mut rng = Rng::new(0x5eed_0000 + s);
            let mut history = Vec::new();
            let mut ratios = Vec::new();
            let mut shares = Vec::new();
            let mut pooled: Vec<f64> = Vec::new();
            let judge_batch = |x: &[[f64; 2]],
                               y: &[f64],
                               history: &[f64],
                               ratios: &[f64],
                               shares: &[f64],
                               pooled: &[f64],
                               rng: &mut Rng| {
                let (actual, shuffled) = sim_losses(x, y, rng);
                let p = judge_pairing(
                    &PairingInput {
                        name: "ref".into(),
                        actual,
                        shuffled,
                        holdout_loss: Some(13.0),
                        history: history.to_vec(),
                    },
                    alpha,
                );
                let scale = (!pooled.is_empty())
                    .then(|| judge_scale(rms(y) / rms(pooled), ratios))
                    .flatten();
                let keys: Vec<(i64, i64, i64)> = x
                    .iter()
                    .zip(y)
                    .map(|(v, t)| ((v[0] * 1e3) as i64, (v[1] * 1e3) as i64, (t * 1e3) as i64))
                    .collect();
                let copies = judge_copies(modal_share(&keys), y.len(), shares);
                judge(&[p], scale.as_ref(), &copies).suspect
            };
            for night in 0..20 {
                let (x, y) = sim_batch(&mut rng, n);
                if night >= 1 {
                    ordinary += 1;
                    if judge_batch(&x, &y, &history, &ratios, &shares, &pooled, &mut rng) {
                        false_flags += 1;
                    }
                }
                let fifth = n / 5;
                let (a, sh) = sim_losses(&x[..fifth], &y[..fifth], &mut rng);
                if let Some(e) = explained(&a, &sh) {
                    history.push(e);
                }
                if !pooled.is_empty() {
                    ratios.push(rms(&y) / rms(&pooled));
                }
                shares.push(modal_share(
                    &y[..fifth]
                        .iter()
                        .map(|t| (t * 1e3) as i64)
                        .collect::<Vec<_>>(),
                ));
                pooled.extend(&y);
            }
            for (kind, hit) in caught.iter_mut().enumerate() {
                let (mut x, mut y) = sim_batch(&mut rng, n);
                match kind {
                    0 => rng.shuffle(&mut y),
                    1 => y.iter_mut().for_each(|t| *t *= 1000.0),
                    _ => {
                        let (x0, y0) = (x[0], y[0]);
                        x.iter_mut().skip(n / 10).for_each(|v| *v = x0);
                        y.iter_mut().skip(n / 10).for_each(|t| *t = y0);
                    }
                }
                if judge_batch(&x, &y, &history, &ratios, &shares, &pooled, &mut rng) {
                    *hit += 1;
                }
            }
        }
        let rate = |k: usize, of: usize| k as f64 / of as f64;
        (
            rate(false_flags, ordinary),
            rate(caught[0], streams as usize),
            rate(caught[1], streams as usize),
            rate(caught[2], streams as usize),
        )
    }

    #[test]
    fn simulated_streams_with_day_effects_are_rarely_set_aside_and_faults_are_caught() {
        // 40 streams: 760 ordinary nights, 40 faults of each kind (the full
        // measurement is `suspect_rates`).
        let (false_rate, shuffled, scaled, copies) = sim_rates(40, 160, 0.05);
        assert!(false_rate <= 0.01, "false set-aside rate {false_rate}");
        assert!(shuffled >= 0.8, "shuffled targets caught in {shuffled}");
        assert_eq!(scaled, 1.0);
        assert_eq!(copies, 1.0);
    }

    /// The rates quoted in DEVELOPERS.md:
    /// `cargo test --release --lib gate::suspect::tests::suspect_rates -- --ignored --nocapture`
    #[test]
    #[ignore]
    fn suspect_rates() {
        for (n, alpha) in [
            (50, 0.01),
            (160, 0.01),
            (1000, 0.01),
            (50, 0.05),
            (160, 0.05),
            (1000, 0.05),
        ] {
            let (f, s, x, c) = sim_rates(500, n, alpha);
            println!(
                "alpha {alpha}, {n} rows a night: false set-aside {:.2}% of ordinary nights; caught: shuffled {:.1}%, ×1000 {:.1}%, one row repeated {:.1}%",
                100.0 * f,
                100.0 * s,
                100.0 * x,
                100.0 * c
            );
        }
    }
}
