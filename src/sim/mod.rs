//! Simulated streams for measuring the decision rules' error rates on data
//! that arrives one day per file, through the real intake, fresh-data check
//! and retrain cycle on a real state dir.
//!
//! The invented scenario: a property company meters the cooling energy of
//! office buildings. Each night one file arrives with a reading per meter:
//! the building, its zone of the city, the weekday, the day's outdoor
//! temperature (one value per zone, a little noise per building), the
//! share of desks booked, and the energy used. Every row of a night shares
//! an unrecorded day effect (a multiplicative factor, sd `day_sd`), a
//! weekly pattern and the day's weather; buildings and zones have their own
//! levels. Nothing else changes from night to night unless a scenario says
//! so:
//!
//! - [`Change::None`]: a stationary stream;
//! - [`Change::ZoneShift`]: from a given night, one zone's energy use rises
//!   by a factor (a real change in the world: the inputs still explain the
//!   target, differently);
//! - worse models are made by [`make_worse`]: a seeded random error per
//!   building added to the serving model until its holdout loss is a given
//!   factor higher, then promoted as if the gate had passed it.

use std::fmt::Write;
use std::path::Path;

use chrono::Utc;

use crate::audit::Event;
use crate::config::Config;
use crate::cycle::{self, ModelRecord};
use crate::fresh;
use crate::ids::{BatchId, ModelId};
use crate::intake::{self, Source};
use crate::model::checkpoint::CheckpointMeta;
use crate::model::{Model, adam};
use crate::rng::Rng;
use crate::state::{self, Owner, StateDir};
use crate::store::{META_NEXT_MODEL, META_SERVING, Split};

const WEEKDAYS: [&str; 7] = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"];
const WEEKLY: [f64; 7] = [1.05, 1.08, 1.1, 1.07, 0.98, 0.55, 0.45];
const ZONES: [&str; 6] = ["north", "south", "east", "west", "docks", "centre"];

/// A change written into a stream.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Change {
    None,
    /// From `night` (1-based) on, zone `zone`'s energy use is multiplied
    /// by `factor`.
    ZoneShift {
        night: usize,
        zone: usize,
        factor: f64,
    },
}

/// How a stream is generated.
#[derive(Debug, Clone, Copy)]
pub struct StreamSpec {
    pub seed: u64,
    pub nights: usize,
    /// Buildings, each with `meters` meters: rows per night ≈ buildings × meters.
    pub buildings: usize,
    pub meters: usize,
    /// sd of the unrecorded day effect (0.12 ≈ ±12%).
    pub day_sd: f64,
    pub change: Change,
}

impl StreamSpec {
    pub fn stationary(seed: u64, nights: usize) -> StreamSpec {
        StreamSpec {
            seed,
            nights,
            buildings: 38,
            meters: 4,
            day_sd: 0.12,
            change: Change::None,
        }
    }
}

/// The config the simulated stream is judged with: every key at its
/// default, as a new user would run it.
pub const CONFIG: &str = r#"
[data]
target = "kwh"
task = "regression"

[[data.columns]]
name = "building"
kind = "category"

[[data.columns]]
name = "zone"
kind = "category"

[[data.columns]]
name = "weekday"
kind = "category"

[[data.columns]]
name = "outdoor_c"
kind = "number"

[[data.columns]]
name = "booked"
kind = "number"
min = 0
max = 1

[[data.columns]]
name = "kwh"
kind = "number"
min = 0
"#;

/// The nightly files of a stream: (name, CSV text).
pub fn stream(spec: &StreamSpec) -> Vec<(String, String)> {
    let mut rng = Rng::new(spec.seed);
    let buildings: Vec<(usize, f64, f64)> = (0..spec.buildings)
        .map(|_| {
            let zone = rng.below(ZONES.len());
            let size = 0.5 + 1.5 * rng.uniform();
            let glass = 0.6 + 0.8 * rng.uniform();
            (zone, size, glass)
        })
        .collect();
    let zone_level: Vec<f64> = (0..ZONES.len())
        .map(|_| 0.8 + 0.4 * rng.uniform())
        .collect();
    let mut out = Vec::new();
    for night in 1..=spec.nights {
        let weekday = (night - 1) % 7;
        let season = 22.0 + 4.0 * ((night as f64) / 30.0).sin();
        let day = (spec.day_sd * rng.normal()).exp();
        let zone_temp: Vec<f64> = (0..ZONES.len())
            .map(|_| season + 3.0 * rng.normal())
            .collect();
        let mut csv = String::from("building,zone,weekday,outdoor_c,booked,kwh\n");
        for (b, &(zone, size, glass)) in buildings.iter().enumerate() {
            let temp = zone_temp[zone] + 0.5 * rng.normal();
            for _ in 0..spec.meters {
                let booked = (0.2 + 0.7 * rng.uniform()) * if weekday >= 5 { 0.3 } else { 1.0 };
                let cooling = (temp - 16.0).max(0.0) * glass;
                let shift = match spec.change {
                    Change::ZoneShift {
                        night: from,
                        zone: z,
                        factor,
                    } if night >= from && zone == z => factor,
                    _ => 1.0,
                };
                let mean = 40.0
                    * size
                    * zone_level[zone]
                    * WEEKLY[weekday]
                    * (0.6 + 0.9 * booked)
                    * (1.0 + 0.08 * cooling)
                    * day
                    * shift;
                let kwh = (mean + 0.12 * mean * rng.normal()).max(0.0);
                writeln!(
                    csv,
                    "B{b:03},{},{},{temp:.1},{booked:.3},{kwh:.2}",
                    ZONES[zone], WEEKDAYS[weekday]
                )
                .expect("write to String");
            }
        }
        out.push((format!("night-{night:03}.csv"), csv));
    }
    out
}

/// What happened on one simulated night.
#[derive(Debug, Clone, Default)]
pub struct Night {
    pub night: usize,
    pub batch: Option<BatchId>,
    /// The fresh-data check's verdict ("untested" when no model served).
    pub verdict: String,
    pub drift_flagged: Vec<String>,
    pub rolled_back: bool,
    pub promoted: bool,
    /// The serving model after the night.
    pub serving: Option<ModelId>,
}

/// A state dir fed one file per night.
pub struct Run {
    pub owner: Owner,
    files: std::path::PathBuf,
    user: String,
}

impl Run {
    /// A new state dir under `dir` with the simulation's config.
    pub fn new(dir: &Path) -> anyhow::Result<Run> {
        let config_path = dir.join("sim.toml");
        std::fs::write(&config_path, CONFIG)?;
        let config = Config::parse(CONFIG, &config_path)?;
        let state = StateDir::new(dir.join("state"));
        let user = "sim".to_string();
        let owner = state::create(&state, &config, CONFIG, &user)?;
        let files = dir.join("files");
        std::fs::create_dir_all(&files)?;
        Ok(Run { owner, files, user })
    }

    /// Takes one file, runs the fresh-data check and, when `retrain`, one
    /// cycle, as a daemon with `min_new_rows` below a night's rows would.
    pub fn night(
        &mut self,
        night: usize,
        name: &str,
        text: &str,
        retrain: bool,
    ) -> anyhow::Result<Night> {
        let path = self.files.join(name);
        std::fs::write(&path, text)?;
        let mut out = Night {
            night,
            verdict: "untested".into(),
            ..Night::default()
        };
        let outcome =
            intake::take_file(&mut self.owner, &path, Source::Keep, &self.user, Utc::now())?;
        let intake::Outcome::Accepted { batch, entry } = outcome else {
            anyhow::bail!("night {night} was not accepted");
        };
        out.batch = Some(batch.id);
        if let Event::BatchAccepted {
            drift: Some(report),
            ..
        } = &entry.event
        {
            out.drift_flagged = report.flagged().iter().map(|s| s.to_string()).collect();
        }
        if let Some(found) = fresh::check_batch(&mut self.owner, batch.id, &self.user)? {
            out.verdict = found.evidence.verdict.clone();
            out.rolled_back = found.rollback.is_some();
        }
        if retrain {
            let before = self.owner.store.serving()?;
            cycle::run(
                &mut self.owner,
                cycle::Options::default(),
                &self.user,
                None,
                None,
            )?;
            let after = self.owner.store.serving()?;
            out.promoted = after.is_some() && after != before;
        }
        out.serving = self.owner.store.serving()?;
        Ok(out)
    }
}

/// Makes the serving model `factor` times worse on the stored holdout rows
/// (a seeded random perturbation of how it reads the first category
/// column, grown until the mean holdout loss is `factor` times its own),
/// saves it as a new version and promotes it with the old one as its
/// predecessor, as if the gate had passed it. Returns the new model's id.
pub fn make_worse(owner: &mut Owner, factor: f64, user: &str) -> anyhow::Result<ModelId> {
    let serving = owner
        .store
        .serving()?
        .ok_or_else(|| anyhow::anyhow!("no model serves"))?;
    let ck = owner.checkpoint(serving)?;
    let holdout = owner.store.rows(Split::Holdout, None, None)?;
    let backend = owner.config.training.predict_backend;
    let base = mean(&ck.model.row_losses(&holdout, backend)?);
    // The weights move by c times a random direction drawn without looking
    // at any data, with the mean output on the holdout rows kept: an error
    // per building, unrelated to the day, so the model is worse in
    // expectation on any night of the same process. (Shrinking the last
    // layer was not: it pulls predictions towards the mean, which helps on
    // nights a model over-reaches, and in several seeds that model beat its
    // predecessor on half the fresh nights. A shifted or stretched output
    // had the same flaw. Perturbing the last layer moved the error with
    // the day's weather and weekday, with the same result.)
    let values = |m: &Model| -> anyhow::Result<Vec<f32>> {
        match m.predict(&holdout, backend)? {
            crate::model::Predictions::Regression { values } => Ok(values),
            _ => anyhow::bail!("the simulation is a regression"),
        }
    };
    let original = values(&ck.model)?;
    let build = |weights: &[crate::model::LayerWeights]| {
        Model::from_parts(
            ck.model.spec().clone(),
            ck.model.config().clone(),
            ck.model.target_scale(),
            ck.model.backend(),
            weights,
            adam(),
        )
    };
    let start = ck.model.weights();
    // The rows of the first layer that read the first category column's
    // one-hot inputs (the building): each building gets its own error,
    // and a night has every building, so the errors do not move with the
    // day.
    let mut offset = 0;
    let mut span = None;
    for e in &ck.model.spec().inputs {
        match e {
            crate::schema::InputEncoding::Number { .. } => offset += 1,
            crate::schema::InputEncoding::OneHot { width, .. } => {
                span = Some(offset..offset + width);
                break;
            }
        }
    }
    let span = span.ok_or_else(|| anyhow::anyhow!("the simulation has a category input"))?;
    let first = start.first().expect("a network has layers");
    let rows = span.start * first.outputs..span.end * first.outputs;
    let rms = (first
        .weight
        .iter()
        .map(|w| f64::from(*w).powi(2))
        .sum::<f64>()
        / first.weight.len().max(1) as f64)
        .sqrt()
        .max(1e-3);
    let mut rng = Rng::new(0x0bad_5eed ^ serving.0);
    let direction: Vec<f32> = rows.clone().map(|_| (rms * rng.normal()) as f32).collect();
    let scaled = |c: f32| -> anyhow::Result<Model> {
        let mut weights = start.clone();
        let first = weights.first_mut().expect("a network has layers");
        for (w, d) in first.weight[rows.clone()].iter_mut().zip(&direction) {
            *w += c * d;
        }
        let moved = values(&build(&weights))?;
        let shift = original
            .iter()
            .zip(&moved)
            .map(|(a, b)| f64::from(b - a))
            .sum::<f64>()
            / original.len().max(1) as f64;
        let last = weights.last_mut().expect("a network has layers");
        last.bias[0] -= (shift / ck.model.target_scale().std) as f32;
        Ok(build(&weights))
    };
    let loss_at =
        |c: f32| -> anyhow::Result<f64> { Ok(mean(&scaled(c)?.row_losses(&holdout, backend)?)) };
    let mut hi = 1.0f32;
    while loss_at(hi)? < factor * base && hi < 1e6 {
        hi *= 2.0;
    }
    let mut lo = 0.0f32;
    for _ in 0..40 {
        let mid = 0.5 * (lo + hi);
        if loss_at(mid)? < factor * base {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let worse = scaled(0.5 * (lo + hi))?;
    let id = owner.store.next_model_id()?;
    let vocabs = owner.store.vocabularies().clone();
    let meta = CheckpointMeta {
        id,
        parent: Some(serving),
        created_at: Utc::now(),
        schema_fingerprint: &owner.config.schema_fingerprint(),
        vocabularies: &vocabs,
    };
    worse.save(&owner.state.models(), &ck.manifest.summary, &meta)?;
    let through = cycle::model_record(owner, serving)?.trained_through;
    let record = ModelRecord {
        id,
        parent: Some(serving),
        run: ck.manifest.kind,
        trained_through: through,
        cycle: 0,
        holdout_loss: mean(&worse.row_losses(&holdout, backend)?),
    };
    let evidence = crate::audit::GateEvidence::without_test(
        holdout.n_rows(),
        base,
        record.holdout_loss,
        format!("simulation: a model made {factor}× worse, promoted on purpose"),
    );
    let entry = owner.store.record_with_meta(
        Event::Promoted {
            cycle: 0,
            model: id,
            previous: Some(serving),
            evidence,
        },
        user,
        Utc::now(),
        &[
            (META_NEXT_MODEL, Some(id.next().key().to_vec())),
            (
                &cycle::model_key(id),
                Some(serde_json::to_vec(&record).expect("record serialises")),
            ),
            (META_SERVING, Some(id.key().to_vec())),
            (fresh::META_MONITOR, None),
        ],
    )?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    Ok(id)
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Counts over stationary streams: what a user of the defaults would see.
#[derive(Debug, Clone, Default)]
pub struct Tally {
    pub streams: usize,
    pub nights: usize,
    pub checked_nights: usize,
    pub fresh_flags: usize,
    pub drift_nights: usize,
    pub any_flag_nights: usize,
    pub rollbacks: usize,
    pub promotions: usize,
    /// Drift flags per column, and the nights (1-based) they fell on.
    pub drift_columns: std::collections::BTreeMap<String, Vec<usize>>,
}

impl Tally {
    pub fn add(&mut self, nights: &[Night]) {
        self.streams += 1;
        for (i, n) in nights.iter().enumerate() {
            for c in &n.drift_flagged {
                self.drift_columns.entry(c.clone()).or_default().push(i + 1);
            }
            self.nights += 1;
            if n.verdict != "untested" {
                self.checked_nights += 1;
            }
            let fresh_flag = n.verdict == "shifted" || n.verdict == "regressed";
            let drift = !n.drift_flagged.is_empty();
            self.fresh_flags += usize::from(fresh_flag);
            self.drift_nights += usize::from(drift);
            self.any_flag_nights += usize::from(fresh_flag || drift);
            self.rollbacks += usize::from(n.rolled_back);
            self.promotions += usize::from(n.promoted);
        }
    }
}

/// Runs one stream night by night in `dir`, a cycle after every night.
pub fn run_stream(dir: &Path, spec: &StreamSpec) -> anyhow::Result<Vec<Night>> {
    let mut run = Run::new(dir)?;
    let mut nights = Vec::new();
    for (i, (name, text)) in stream(spec).iter().enumerate() {
        nights.push(run.night(i + 1, name, text, true)?);
    }
    Ok(nights)
}

#[cfg(test)]
mod tests;
