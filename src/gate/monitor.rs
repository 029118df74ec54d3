//! Monitoring the serving model against the model it replaced, batch after
//! batch, so that the chance of a false automatic rollback over the serving
//! model's whole time in service stays at or below alpha.
//!
//! Each fresh batch b gives one observation: x_b, the log of the ratio of
//! mean losses, ln(loss(serving) / loss(previous)) over its rows (positive:
//! the serving model did worse), and w_b, the within-batch variance of that
//! log ratio (delta method, from its rows). A ratio, not a difference:
//! a hard day raises both models' losses in proportion, so differences
//! swing with the day while ratios stay put (measured on the demo's
//! heatwave: differences with a coefficient of variation of 0.45 across
//! nights, log ratios 0.12).
//! Rows of one batch share a day, so the batch, not the row, is the unit:
//! x_b ~ N(θ, w_b + τ²), where τ² is the day-to-day variance that no count of
//! rows within a batch reveals. The question is θ ≤ 0 (no worse) against
//! θ > 0, with τ² unknown.
//!
//! The evidence is an e-process built by sequential universal inference
//! (Wasserman, Ramdas & Balakrishnan 2020, PNAS 117:16880): a predictable
//! joint density q of the batches over the best null fit,
//!
//!   E_n = q(x_1..x_n) / sup_{θ ≤ 0, τ² ≥ 0} Π_{b ≤ n} N(x_b; θ, w_b + τ²).
//!
//! For every null (θ₀ ≤ 0, τ₀²), q over the true null likelihood is a
//! non-negative martingale with mean 1 and the denominator is at least that
//! likelihood, so by Ville's inequality (Ville 1939) P(sup_n E_n ≥ 1/alpha)
//! ≤ alpha: looking after every batch, forever, is allowed. q only decides
//! how fast a true regression is caught, so it is built to be robust:
//!
//! - **q is a Bayesian marginal likelihood**, a mixture over the day-to-day
//!   variance τ² and over the scale of a normal prior on θ (mean
//!   [`GUESS`], a log ratio of 0.2). Most weight goes to the plug-in τ̂²
//!   from how the two models' log ratios varied across the stored holdout
//!   batches ([`PLUGIN_COMPONENTS`]); the rest is spread over a log grid of
//!   τ from 0.03 to 1, each with a prior sd of θ of 1 ([`TAU_GRID`],
//!   [`THETA_SDS`]). A mixture of joint
//!   densities is a joint density, so the argument above holds. The plug-in
//!   alone was not robust: when the day-to-day spread of the differences
//!   turned out far larger than on the holdout batches, every batch cost
//!   evidence, and a model four times worse than its predecessor went
//!   unseen (measured on a heatwave in the demo generator: evidence 1e-131
//!   against the right model).
//! - **Evidence may start at any batch.** E_n = Σ_s π_s E_{s,n}, where
//!   E_{s,n} is the same ratio over batches s..n only and π_s = 0.7 for the
//!   first batch and 0.3/((s−1)s) after it (Σ π_s = 1). Each E_{s,n} is
//!   bounded by a test martingale that is 1 before s, so the mixture is
//!   too, and Ville's bound still holds (the sum runs over the first and
//!   the 30 most recent starts; fewer terms only lower it). A model that
//!   was fine on its first nights and turns worse later (the world changed
//!   under it) is judged on the batches since the change, at a price of
//!   ln(1/π_s).
//!
//! Assumptions (stated in the README): batch means are close to normal
//! (each is a mean of many rows), w_b is known (estimated from the batch's
//! own rows), and the day effects are independent across batches with one
//! variance while a start's batches last.

use super::show;

/// One fresh batch as the monitor keeps it.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Observation {
    /// ln(mean loss of the serving model / mean loss of the previous one)
    /// over the batch's tested rows.
    pub x: f64,
    /// Variance of that log ratio from the rows of the batch (delta method).
    pub w: f64,
    /// The batch's factor of the numerator q given the batches before it.
    pub log_numerator: f64,
}

/// The regression the monitor bets on first: a log loss ratio of 0.2,
/// about 22% more loss (common practice, no source: a size worth acting
/// on).
pub const GUESS: f64 = 0.2;

/// The plug-in chosen when a model's monitoring starts.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Prior {
    /// Day-to-day variance of the batch log ratios, measured on the stored
    /// holdout batches (≥ 0).
    pub tau2: f64,
}

impl Prior {
    /// The prior for a pair of models whose per-batch log loss ratios on
    /// the stored holdout batches varied with day-to-day variance `tau2`
    /// (a value that is not finite counts as 0).
    pub fn new(tau2: f64) -> Prior {
        Prior {
            tau2: if tau2.is_finite() { tau2.max(0.0) } else { 0.0 },
        }
    }
}

fn ln_normal(x: f64, mean: f64, var: f64) -> f64 {
    let var = var.max(f64::MIN_POSITIVE);
    -0.5 * ((2.0 * std::f64::consts::PI * var).ln() + (x - mean) * (x - mean) / var)
}

/// The observation for a new batch; its `log_numerator` is the batch's
/// factor of the numerator q given the earlier batches (ln q(x_1..x_n) −
/// ln q(x_1..x_{n−1})), kept for the audit trail.
pub fn observe(prior: &Prior, past: &[Observation], x: f64, w: f64) -> Observation {
    let mut all = past.to_vec();
    let mut o = Observation {
        x,
        w,
        log_numerator: 0.0,
    };
    all.push(o);
    o.log_numerator = ln_numerator(prior, &all) - ln_numerator(prior, past);
    o
}

/// sup over θ ≤ 0 and τ² ≥ 0 of Σ ln N(x_b; θ, w_b + τ²).
fn ln_null_max(obs: &[Observation]) -> f64 {
    let profile = |tau2: f64| -> f64 {
        let (mut a, mut b) = (0.0, 0.0);
        for o in obs {
            let v = (o.w + tau2).max(f64::MIN_POSITIVE);
            a += o.x / v;
            b += 1.0 / v;
        }
        let theta = (a / b).min(0.0);
        obs.iter().map(|o| ln_normal(o.x, theta, o.w + tau2)).sum()
    };
    let spread = obs.iter().map(|o| o.x * o.x + o.w).sum::<f64>() / obs.len().max(1) as f64;
    let scale = if spread.is_finite() && spread > 0.0 {
        spread
    } else {
        1.0
    };
    // A log grid over τ² (and τ² = 0), then golden-section refinement
    // around the best grid point.
    let mut best = (0.0, profile(0.0));
    let grid: Vec<f64> = (0..=72)
        .map(|i| scale * 10f64.powf(-8.0 + 12.0 * i as f64 / 72.0))
        .collect();
    let mut at = None;
    for (i, &t) in grid.iter().enumerate() {
        let v = profile(t);
        if v > best.1 {
            best = (t, v);
            at = Some(i);
        }
    }
    if let Some(i) = at {
        let (mut lo, mut hi) = (
            if i == 0 { 0.0 } else { grid[i - 1] },
            grid[(i + 1).min(grid.len() - 1)],
        );
        let r = 0.5 * (5f64.sqrt() - 1.0);
        for _ in 0..50 {
            let a = hi - r * (hi - lo);
            let b = lo + r * (hi - lo);
            if profile(a) >= profile(b) {
                hi = b;
            } else {
                lo = a;
            }
        }
        let v = profile(0.5 * (lo + hi));
        if v > best.1 {
            best = (0.5 * (lo + hi), v);
        }
    }
    best.1
}

/// The numerator's components that use the plug-in τ̂² from the stored
/// holdout batches: (sd of the normal prior on θ around [`GUESS`], weight),
/// on the log-ratio scale. The narrow one bets on a regression near the
/// guess, the wide one on any size up to a loss several times higher.
pub const PLUGIN_COMPONENTS: [(f64, f64); 2] = [(0.05, 0.5), (1.0, 0.1)];
/// The robust components share the remaining weight equally: every
/// day-to-day sd of [`TAU_GRID`] with every prior scale of [`THETA_SDS`].
/// Few components on purpose: each halving of a component's weight costs
/// ln 2 of evidence, and a grid of 45 cost a model four times worse its
/// rollback (common practice, no source: a coarse scale mixture).
pub const THETA_SDS: [f64; 1] = [1.0];
/// Day-to-day sd of the log ratios.
pub const TAU_GRID: [f64; 4] = [0.03, 0.1, 0.3, 1.0];

/// ln Σ e^{v}, without overflow; −∞ for an empty list.
fn ln_sum_exp(values: impl Iterator<Item = f64>) -> f64 {
    let v: Vec<f64> = values.filter(|x| !x.is_nan()).collect();
    let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !hi.is_finite() {
        return hi;
    }
    hi + v.iter().map(|x| (x - hi).exp()).sum::<f64>().ln()
}

/// ln of the marginal likelihood of `obs` for one τ² and a normal prior
/// N(mean0, sd0²) on θ: the product of each batch's posterior predictive
/// density given the batches before it.
fn ln_marginal(obs: &[Observation], tau2: f64, mean0: f64, sd0: f64) -> f64 {
    let mut precision = 1.0 / (sd0 * sd0).max(f64::MIN_POSITIVE);
    let mut weighted = mean0 * precision;
    let mut total = 0.0;
    for o in obs {
        let v = (o.w + tau2).max(f64::MIN_POSITIVE);
        total += ln_normal(o.x, weighted / precision, v + 1.0 / precision);
        weighted += o.x / v;
        precision += 1.0 / v;
    }
    total
}

/// ln q(obs): the numerator, a mixture over τ² and over the prior scale of
/// θ (see the module's notes); 0 for no batches.
pub fn ln_numerator(prior: &Prior, obs: &[Observation]) -> f64 {
    if obs.is_empty() {
        return 0.0;
    }
    let tau2 = prior.tau2.max(0.0);
    let robust_weight = (1.0 - PLUGIN_COMPONENTS.iter().map(|c| c.1).sum::<f64>())
        / (TAU_GRID.len() * THETA_SDS.len()) as f64;
    let plugin = PLUGIN_COMPONENTS
        .iter()
        .map(|(sd, wt)| wt.ln() + ln_marginal(obs, tau2, GUESS, *sd));
    let robust = TAU_GRID.iter().flat_map(|t| {
        THETA_SDS
            .iter()
            .map(move |sd| robust_weight.ln() + ln_marginal(obs, t * t, GUESS, *sd))
    });
    let terms: Vec<f64> = plugin.chain(robust).collect();
    ln_sum_exp(terms.into_iter())
}

/// How many of the most recent batches the evidence may start at (besides
/// the first).
const RECENT_STARTS: usize = 30;

/// Weight of the evidence that starts at batch `s` (1-based): 0.7 for the
/// first, 0.3/((s−1)s) after it; they sum to 1.
fn start_weight(s: usize) -> f64 {
    if s <= 1 {
        0.7
    } else {
        0.3 / ((s - 1) as f64 * s as f64)
    }
}

/// ln E_n over the observations so far (0 with none): the mixture over
/// start batches of the numerator over the best null fit.
pub fn ln_evidence(prior: &Prior, obs: &[Observation]) -> f64 {
    evidence_by_start(prior, obs).0
}

/// ln E_n, and the start (0-based) whose term is largest.
fn evidence_by_start(prior: &Prior, obs: &[Observation]) -> (f64, usize) {
    if obs.is_empty() {
        return (0.0, 0);
    }
    // The first start and the most recent ones: leaving starts out only
    // lowers the sum, so the bound holds, and the cost stays flat over a
    // long service life.
    let n = obs.len();
    let recent = n.saturating_sub(RECENT_STARTS).max(1);
    let terms: Vec<(usize, f64)> = std::iter::once(0)
        .chain(recent..n)
        .map(|s| {
            let tail = &obs[s..];
            (
                s,
                start_weight(s + 1).ln() + ln_numerator(prior, tail) - ln_null_max(tail),
            )
        })
        .collect();
    let best = terms
        .iter()
        .copied()
        .fold((0, f64::NEG_INFINITY), |a, b| if b.1 > a.1 { b } else { a });
    (ln_sum_exp(terms.iter().map(|t| t.1)), best.0)
}

/// The monitor's state after the newest batch, and what it means.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    pub batches: usize,
    /// E_n: how many times more likely the batches are if the serving model
    /// is worse than under the best case for "no worse".
    pub evidence: f64,
    /// 1 / alpha: evidence at or above this rolls back.
    pub needed: f64,
    /// The most recent batches that carry most of the evidence (all of
    /// them unless the difference changed while the model served).
    pub recent: usize,
    /// Mean of x over those batches (positive: the serving model did worse).
    pub mean_difference: f64,
    pub regressed: bool,
}

impl Reading {
    pub fn reason(&self) -> String {
        let over = if self.recent == self.batches {
            String::new()
        } else {
            format!(", most of it from the last {}", self.recent)
        };
        format!(
            "evidence that the serving model is worse: {} after {} batch{}{over}, {} needed \
             (mean log loss ratio per batch {})",
            show(self.evidence),
            self.batches,
            if self.batches == 1 { "" } else { "es" },
            show(self.needed),
            show(self.mean_difference)
        )
    }
}

/// Reads the monitor at level `alpha` (0 < alpha ≤ 0.5).
pub fn read(prior: &Prior, obs: &[Observation], alpha: f64) -> Reading {
    let (ln_e, start) = evidence_by_start(prior, obs);
    let evidence = ln_e.exp();
    let needed = 1.0 / alpha;
    let tail = &obs[start.min(obs.len())..];
    let mean_difference = tail.iter().map(|o| o.x).sum::<f64>() / tail.len().max(1) as f64;
    Reading {
        batches: obs.len(),
        evidence,
        needed,
        recent: tail.len(),
        mean_difference,
        regressed: alpha > 0.0 && alpha <= 0.5 && ln_e >= needed.ln() && mean_difference > 0.0,
    }
}

/// τ̂²: how much per-batch mean differences varied across batches beyond
/// what their own rows explain (method of moments, never below 0). Each
/// item is (mean, within variance of the mean) of one batch; `None` with
/// fewer than 3 batches.
pub fn between_batch_variance(batches: &[(f64, f64)]) -> Option<f64> {
    let g = batches.len();
    if g < 3 {
        return None;
    }
    let m = batches.iter().map(|b| b.0).sum::<f64>() / g as f64;
    let s2 = batches.iter().map(|b| (b.0 - m).powi(2)).sum::<f64>() / (g - 1) as f64;
    let within = batches.iter().map(|b| b.1).sum::<f64>() / g as f64;
    let v = s2 - within;
    v.is_finite().then_some(v.max(0.0))
}

/// The two-sided normal-mixture sequential probability ratio for a normal
/// mean with known σ² and an N(0, τ²) mixing distribution (Robbins 1970;
/// Johari, Pekelis & Walsh 2017):
/// Λ_n = sqrt(σ²/(σ²+nτ²)) · exp(n²τ²x̄² / (2σ²(σ²+nτ²))).
/// Kept beside the e-process as the textbook special case it reduces to
/// when τ² across batches is known: the tests check both against it.
pub fn msprt(n: usize, mean: f64, sigma2: f64, tau2: f64) -> f64 {
    let nf = n as f64;
    (sigma2 / (sigma2 + nf * tau2)).sqrt()
        * (nf * nf * tau2 * mean * mean / (2.0 * sigma2 * (sigma2 + nf * tau2))).exp()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::gate::near;
    use crate::rng::Rng;

    #[test]
    fn msprt_matches_the_published_formula_values() {
        // CHECKS.md, computed from the formula of Robbins (1970) / Johari,
        // Pekelis & Walsh (2017) with σ² = τ² = 1.
        near(msprt(10, 0.5, 1.0, 1.0), 0.9393342, 1e-6);
        near(msprt(100, 0.3, 1.0, 1.0), 8.566723, 1e-5);
        near(msprt(100, 0.1, 1.0, 1.0), 0.1632438, 1e-6);
    }

    /// Simulated batch means: x_b = θ + day effect + within noise.
    fn stream(rng: &mut Rng, n: usize, theta: f64, tau: f64, within_sd: f64) -> Vec<(f64, f64)> {
        (0..n)
            .map(|_| {
                let x = theta + tau * rng.normal() + within_sd * rng.normal();
                // w estimated from ~150 rows: a little noise around the truth.
                let w = within_sd * within_sd * (1.0 + 0.1 * rng.normal()).max(0.5);
                (x, w)
            })
            .collect()
    }

    fn run(prior: &Prior, batches: &[(f64, f64)], alpha: f64) -> Option<usize> {
        let mut obs = Vec::new();
        for (i, &(x, w)) in batches.iter().enumerate() {
            let o = observe(prior, &obs, x, w);
            obs.push(o);
            if read(prior, &obs, alpha).regressed {
                return Some(i + 1);
            }
        }
        None
    }

    /// When the monitor (alpha 0.05, the prior knowing the day variance)
    /// stops in each of `runs` streams of `n` batches.
    fn stopping_times(
        rng: &mut Rng,
        runs: usize,
        n: usize,
        theta: f64,
        tau: f64,
        within_sd: f64,
    ) -> Vec<Option<usize>> {
        (0..runs)
            .map(|_| {
                let batches = stream(rng, n, theta, tau, within_sd);
                run(&Prior::new(tau * tau), &batches, 0.05)
            })
            .collect()
    }

    fn within(caught: &[Option<usize>], k: usize) -> usize {
        caught.iter().filter(|c| c.is_some_and(|n| n <= k)).count()
    }

    #[test]
    fn no_worse_model_is_rolled_back_at_most_alpha_over_a_long_service_life() {
        // Ville's inequality: the chance of ever crossing 1/alpha under the
        // null is at most alpha, however long the monitor looks. Day
        // effects as large as the within-batch noise, 60 batches a life,
        // and the plug-in τ̂² wrong by a factor of 4 (it only costs power).
        let alpha = 0.05;
        let mut rng = Rng::new(11);
        let lives = 1_000;
        let mut false_rollbacks = 0;
        for life in 0..lives {
            let theta = if life % 2 == 0 { 0.0 } else { -0.05 };
            let batches = stream(&mut rng, 60, theta, 0.1, 0.1);
            let prior = Prior::new(0.0025);
            if run(&prior, &batches, alpha).is_some() {
                false_rollbacks += 1;
            }
        }
        let rate = false_rollbacks as f64 / lives as f64;
        // Binomial sd at 5% over 1,000 lives is 0.7%; allow 3 sd.
        assert!(rate <= alpha + 0.021, "false rollbacks {rate}");
    }

    #[test]
    fn a_clearly_worse_model_is_caught_within_a_few_batches() {
        // 25% higher loss: x ≈ 0.25 per batch with within sd 0.09 (150
        // rows) and small day effects, as in the simulation suite. With
        // the day-to-day variance unknown, two or three batches cannot
        // rule out "a wide spread around no difference" at 5%; by six
        // they can (measured: 4 of 500 within 3, 456 within 6).
        let mut rng = Rng::new(12);
        let caught = stopping_times(&mut rng, 500, 6, 0.25, 0.03, 0.09);
        let (in3, in6) = (within(&caught, 3), within(&caught, 6));
        println!("caught within 3 batches: {in3}/500, within 6: {in6}/500");
        assert!(in6 >= 400, "within 3: {in3}, within 6: {in6} of 500");
    }

    #[test]
    fn a_model_that_turns_worse_while_serving_is_still_caught() {
        // The world changes under a serving model: on its first batch it
        // was far better than its predecessor (log ratio −2), then it is
        // about four times worse, with day-to-day spread 0.2, and the
        // plug-in τ̂² from the holdout batches is far off. Before the
        // robust components and the later starts, the evidence fell to
        // 1e-131 here; now the later start carries it.
        let mut rng = Rng::new(14);
        let mut caught = Vec::new();
        for _ in 0..200 {
            let prior = Prior::new(0.0004);
            let mut batches = vec![(-2.0, 0.002)];
            batches.extend((0..8).map(|_| (1.4 + 0.2 * rng.normal(), 0.002)));
            caught.push(run(&prior, &batches, 0.05).map(|n| n - 1));
        }
        let (in4, in6) = (within(&caught, 4), within(&caught, 6));
        println!("after the change: within 4 batches {in4}, within 6 {in6} of 200");
        assert!(in6 >= 180, "within 4: {in4}, within 6: {in6} of 200");
    }

    #[test]
    fn a_model_far_worse_than_the_guess_is_caught_within_a_few_batches() {
        // The prior guesses a fifth of the loss. Models 1, 2 and 3 times
        // worse (x = 1, 2, 3 L per batch), within sd 0.1 L, day effects
        // 0.05 L: a regression far beyond the guess must not go unseen.
        let mut rng = Rng::new(13);
        for theta in [1.0, 2.0, 3.0] {
            let caught = stopping_times(&mut rng, 200, 4, theta, 0.05, 0.1);
            let (in3, in4) = (within(&caught, 3), within(&caught, 4));
            println!("{theta}: within 3 batches {in3}, within 4 {in4} of 200");
            assert!(
                in4 >= 140,
                "{theta}: within 3 batches {in3}, within 4 {in4} of 200"
            );
        }
    }

    #[test]
    fn evidence_is_bounded_by_its_null_fit_and_needs_a_positive_mean() {
        let prior = Prior::new(0.0);
        let mut obs = Vec::new();
        for x in [-0.3, -0.2, -0.4] {
            let o = observe(&prior, &obs, x, 0.01);
            obs.push(o);
        }
        let r = read(&prior, &obs, 0.05);
        assert!(!r.regressed);
        assert!(r.evidence < 1.0, "{}", r.evidence);
        assert_eq!(read(&prior, &[], 0.05).evidence, 1.0);
    }

    #[test]
    fn between_batch_variance_removes_the_within_part() {
        assert_eq!(between_batch_variance(&[(1.0, 0.1), (2.0, 0.1)]), None);
        // Means 0, 1, 2: sample variance 1; within 0.25 each.
        near(
            between_batch_variance(&[(0.0, 0.25), (1.0, 0.25), (2.0, 0.25)]).unwrap(),
            0.75,
            1e-12,
        );
        assert_eq!(
            between_batch_variance(&[(0.0, 5.0), (1.0, 5.0), (2.0, 5.0)]),
            Some(0.0)
        );
    }
}
