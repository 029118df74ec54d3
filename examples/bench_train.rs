//! Throughput of the learning core, each figure beside a reference measured
//! in the same run:
//!
//! - training rows/s per epoch (median over epochs) through tidegate's own
//!   training code, per backend, for 16-64-64-1 and 16-256-256-1 ReLU
//!   networks at batch 256, against a plain single-threaded burn-flex loop
//!   (burn's `Linear`, `MseLoss` and Adam as they come, same rows, same
//!   batch size);
//! - the machine's f32 matrix-multiply peak (square matrices through
//!   burn-flex's matmul, one thread and all threads) and the share of it a
//!   training epoch uses (6 FLOPs per weight per row, forward + backward);
//! - larger batches with a linearly scaled learning rate (rows/s and
//!   validation MSE against batch 256);
//! - the allocator: the same run in child processes with glibc malloc
//!   (plain and tuned) against mimalloc;
//! - two independent training runs on two threads against one;
//! - tanh against ReLU (tidegate's tanh, and burn's own in the plain loop);
//! - prediction rows/s per backend against a plain Rust forward pass.
//!
//! Every figure is one row of a Markdown table:
//! `| figure | value | unit | reference | reference value | ratio | target | met |`.
//!
//! Run: `cargo run --release --example bench_train [-- [--quick] [EPOCHS [ROWS [FILTER]]]]`.
//! `--quick` runs 3 epochs and skips the batch sweep and the 256-wide
//! ndarray run; FILTER keeps only figures whose name contains it.
//! `TIDEGATE_BENCH_ALLOC=glibc` makes the process use glibc malloc instead
//! of mimalloc (the allocator figure sets it in its child processes).

use std::alloc::{GlobalAlloc, Layout, System};
use std::process::Command;
use std::sync::atomic::{AtomicU8, Ordering};
use std::time::Instant;

use burn::module::Module;
use burn::nn::loss::{MseLoss, Reduction};
use burn::nn::{Linear, LinearConfig};
use burn::optim::{AdamConfig, GradientsParams};
use burn::tensor::{Device, Tensor, TensorData};
use tidegate::config::{Activation, Backend, ColumnKind, ModelConfig, Task, TrainingConfig};
use tidegate::model::{LayerWeights, Model};
use tidegate::rng::Rng;
use tidegate::schema::{
    Column, ColumnStats, FeatureSpec, RowMatrix, Schema, Vocabularies, number_cell,
};
use tidegate::train::{Control, Progress, train_cold};

/// The process's allocator, chosen once from `TIDEGATE_BENCH_ALLOC` at the
/// first allocation (before `main`), so every block is freed by the
/// allocator that gave it out.
struct Switch;

static CHOICE: AtomicU8 = AtomicU8::new(0);
const GLIBC: u8 = 1;
const MIMALLOC: u8 = 2;

fn choice() -> u8 {
    let c = CHOICE.load(Ordering::Relaxed);
    if c != 0 {
        return c;
    }
    // getenv does not allocate, so it is safe inside the allocator.
    let v = unsafe { libc::getenv(c"TIDEGATE_BENCH_ALLOC".as_ptr()) };
    let glibc = !v.is_null() && unsafe { std::ffi::CStr::from_ptr(v) }.to_bytes() == b"glibc";
    let c = if glibc { GLIBC } else { MIMALLOC };
    CHOICE.store(c, Ordering::Relaxed);
    c
}

unsafe impl GlobalAlloc for Switch {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        unsafe {
            if choice() == MIMALLOC {
                mimalloc::MiMalloc.alloc(layout)
            } else {
                System.alloc(layout)
            }
        }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        unsafe {
            if choice() == MIMALLOC {
                mimalloc::MiMalloc.dealloc(ptr, layout)
            } else {
                System.dealloc(ptr, layout)
            }
        }
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        unsafe {
            if choice() == MIMALLOC {
                mimalloc::MiMalloc.alloc_zeroed(layout)
            } else {
                System.alloc_zeroed(layout)
            }
        }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        unsafe {
            if choice() == MIMALLOC {
                mimalloc::MiMalloc.realloc(ptr, layout, new_size)
            } else {
                System.realloc(ptr, layout, new_size)
            }
        }
    }
}

#[global_allocator]
static GLOBAL: Switch = Switch;

const INPUTS: usize = 16;
const VALIDATION: f64 = 0.1;

fn data(n: usize, seed: u64) -> (Schema, RowMatrix) {
    let mut columns: Vec<Column> = (0..=INPUTS)
        .map(|i| Column {
            name: format!("c{i}"),
            kind: ColumnKind::Number,
            min: None,
            max: None,
            required: true,
        })
        .collect();
    columns[INPUTS].name = "y".into();
    let schema = Schema {
        columns,
        target: INPUTS,
        task: Task::Regression,
    };
    let mut rng = Rng::new(seed);
    let mut rows = RowMatrix::with_capacity(INPUTS + 1, n);
    let mut cells = vec![0u32; INPUTS + 1];
    for _ in 0..n {
        let v: Vec<f64> = (0..INPUTS).map(|_| rng.normal()).collect();
        let y = v[0].sin() + v[1] * v[2] - 0.5 * v[3] + 0.3 * v[4].abs() + 0.1 * rng.normal();
        for (c, x) in cells.iter_mut().zip(&v) {
            *c = number_cell(Some(*x as f32));
        }
        cells[INPUTS] = number_cell(Some(y as f32));
        rows.push_row(&cells);
    }
    (schema, rows)
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    if s.is_empty() {
        return f64::NAN;
    }
    s[s.len() / 2]
}

/// Weights of a 16-h-h-1 network (6 FLOPs each per row for forward and
/// backward).
fn weight_count(hidden: usize) -> usize {
    INPUTS * hidden + hidden * hidden + hidden
}

/// One figure: its value, the reference measured in the same run, and an
/// optional target on the value or on value / reference.
struct Fig<'a> {
    name: &'a str,
    value: f64,
    unit: &'a str,
    reference: &'a str,
    reference_value: f64,
    target: Option<Target>,
}

#[derive(Clone, Copy)]
enum Target {
    ValueAtLeast(f64),
    RatioAtLeast(f64),
    RatioAtMost(f64),
}

fn fmt_num(v: f64) -> String {
    if !v.is_finite() {
        "n/a".into()
    } else if v.abs() >= 1000.0 {
        format!("{v:.0}")
    } else if v.abs() >= 1.0 {
        format!("{v:.2}")
    } else {
        format!("{v:.5}")
    }
}

fn print_fig(f: Fig<'_>, filter: &str) {
    if !f.name.contains(filter) {
        return;
    }
    let ratio = f.value / f.reference_value;
    let (target, met) = match f.target {
        None => (String::from("-"), "-"),
        Some(Target::ValueAtLeast(t)) => (
            format!("value >= {}", fmt_num(t)),
            if f.value >= t { "yes" } else { "no" },
        ),
        Some(Target::RatioAtLeast(t)) => (
            format!("ratio >= {t}"),
            if ratio >= t { "yes" } else { "no" },
        ),
        Some(Target::RatioAtMost(t)) => (
            format!("ratio <= {t}"),
            if ratio <= t { "yes" } else { "no" },
        ),
    };
    println!(
        "| {} | {} | {} | {} | {} | {:.3} | {} | {} |",
        f.name,
        fmt_num(f.value),
        f.unit,
        f.reference,
        fmt_num(f.reference_value),
        ratio,
        target,
        met
    );
}

struct Setup {
    spec: FeatureSpec,
    rows: RowMatrix,
    epochs: usize,
}

/// Rows/s per epoch (median) by the wall clock and per CPU-second, and the
/// final validation MSE of one tidegate run.
struct RunStats {
    rate: f64,
    cpu_rate: f64,
    val: f64,
}

/// Seconds of CPU time used so far by `clock` (the process, or the calling
/// thread).
fn cpu_seconds(clock: libc::clockid_t) -> f64 {
    let mut ts = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: clock_gettime writes into the timespec passed to it.
    unsafe { libc::clock_gettime(clock, &mut ts) };
    ts.tv_sec as f64 + ts.tv_nsec as f64 * 1e-9
}

fn net_config(hidden: usize, activation: Activation) -> ModelConfig {
    ModelConfig {
        hidden: vec![hidden, hidden],
        activation,
        ..ModelConfig::default()
    }
}

fn train_cfg(backend: Backend, batch: usize, lr: f64, epochs: usize, seed: u64) -> TrainingConfig {
    TrainingConfig {
        backend,
        batch_size: batch,
        learning_rate: lr,
        cold_epochs: epochs,
        patience: 1000,
        validation_fraction: VALIDATION,
        seed,
        ..TrainingConfig::default()
    }
}

/// One tidegate cold run. Besides the wall-clock epoch times the run
/// records itself, the progress callback reads `clock` after the first and
/// the last mini-batch of every epoch, which gives rows per CPU-second for
/// the batches in between: a figure that other processes on the machine
/// disturb far less than the wall clock.
fn timed_train(
    st: &Setup,
    net: &ModelConfig,
    cfg: &TrainingConfig,
    clock: libc::clockid_t,
) -> (RunStats, Model) {
    let start = std::cell::Cell::new(None::<f64>);
    let cpu_rates = std::cell::RefCell::new(Vec::new());
    let train_rows = st.rows.n_rows() - (st.rows.n_rows() as f64 * VALIDATION).round() as usize;
    let timed_rows = train_rows.saturating_sub(cfg.batch_size) as f64;
    let progress = |p: Progress| {
        if p.train_loss.is_some() {
            return;
        }
        if p.batch == 1 {
            start.set(Some(cpu_seconds(clock)));
        } else if p.batch == p.batches
            && let Some(t0) = start.take()
        {
            cpu_rates
                .borrow_mut()
                .push(timed_rows / (cpu_seconds(clock) - t0));
        }
    };
    let control = Control {
        cancel: None,
        progress: Some(&progress),
    };
    let t = train_cold(&st.spec, net, cfg, &st.rows, control).expect("training runs");
    let s = &t.summary;
    let rate: Vec<f64> = s
        .epoch_seconds
        .iter()
        .map(|sec| s.rows as f64 / sec)
        .collect();
    let stats = RunStats {
        rate: median(&rate),
        cpu_rate: median(&cpu_rates.borrow()),
        val: s.validation_loss.last().copied().unwrap_or(f64::NAN),
    };
    (stats, t.model)
}

fn tidegate_run(
    st: &Setup,
    backend: Backend,
    hidden: usize,
    act: Activation,
    batch: usize,
    lr: f64,
) -> (RunStats, Model) {
    let cfg = train_cfg(backend, batch, lr, st.epochs, 7);
    timed_train(
        st,
        &net_config(hidden, act),
        &cfg,
        libc::CLOCK_PROCESS_CPUTIME_ID,
    )
}

/// A plain stack of burn `Linear` layers.
#[derive(Module, Debug)]
struct PlainNet {
    layers: Vec<Linear>,
}

/// The framework as it comes: burn `Linear` layers, `MseLoss`, Adam, one
/// thread, the same encoded rows and batch size, shuffled once.
fn plain_burn(
    x: &[f32],
    y: &[f32],
    hidden: usize,
    tanh: bool,
    batch: usize,
    epochs: usize,
) -> Rate {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .expect("thread pool");
    pool.install(|| {
        let device = Device::flex().autodiff();
        device.seed(3);
        let mut net = PlainNet {
            layers: [(INPUTS, hidden), (hidden, hidden), (hidden, 1)]
                .iter()
                .map(|&(a, b)| LinearConfig::new(a, b).init(&device))
                .collect(),
        };
        let mut optim = AdamConfig::new().init();
        let n = y.len();
        let mut order: Vec<usize> = (0..n).collect();
        Rng::new(5).shuffle(&mut order);
        let mut xs = Vec::with_capacity(n * INPUTS);
        let mut ys = Vec::with_capacity(n);
        for &i in &order {
            xs.extend_from_slice(&x[i * INPUTS..(i + 1) * INPUTS]);
            ys.push(y[i]);
        }
        let loss_fn = MseLoss::new();
        let mut rates = Vec::new();
        let mut cpu_rates = Vec::new();
        for _ in 0..epochs {
            let start = Instant::now();
            let cpu0 = cpu_seconds(libc::CLOCK_PROCESS_CPUTIME_ID);
            let mut at = 0;
            while at < n {
                let m = batch.min(n - at);
                let xb = Tensor::<2>::from_data(
                    TensorData::new(xs[at * INPUTS..(at + m) * INPUTS].to_vec(), [m, INPUTS]),
                    &device,
                );
                let yb = Tensor::<2>::from_data(
                    TensorData::new(ys[at..at + m].to_vec(), [m, 1]),
                    &device,
                );
                let mut h = xb;
                for (i, l) in net.layers.iter().enumerate() {
                    h = l.forward(h);
                    if i < 2 {
                        h = if tanh {
                            burn::tensor::activation::tanh(h)
                        } else {
                            burn::tensor::activation::relu(h)
                        };
                    }
                }
                let loss = loss_fn.forward(h, yb, Reduction::Mean);
                let grads = GradientsParams::from_grads(loss.backward(), &net);
                net = optim.step(1e-3 * batch as f64 / 256.0, net, grads);
                at += m;
            }
            rates.push(n as f64 / start.elapsed().as_secs_f64());
            cpu_rates.push(n as f64 / (cpu_seconds(libc::CLOCK_PROCESS_CPUTIME_ID) - cpu0));
        }
        Rate {
            wall: median(&rates),
            cpu: median(&cpu_rates),
        }
    })
}

/// A rate by the wall clock and per second of the process's CPU time.
#[derive(Clone, Copy)]
struct Rate {
    wall: f64,
    cpu: f64,
}

const NO_RATE: Rate = Rate {
    wall: f64::NAN,
    cpu: f64::NAN,
};

/// f32 matmul GFLOP/s of `size`³ square matrices through burn-flex, in a
/// pool of `threads` threads (median of repeats); per CPU-second it is the
/// work each busy core does.
fn gemm_peak(size: usize, threads: usize, repeats: usize) -> Rate {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("thread pool");
    pool.install(|| {
        let device = Device::flex();
        let mut rng = Rng::new(11);
        let mut mat = || {
            let v: Vec<f32> = (0..size * size).map(|_| rng.uniform() as f32).collect();
            Tensor::<2>::from_data(TensorData::new(v, [size, size]), &device)
        };
        let (a, b) = (mat(), mat());
        let flop = 2.0 * (size as f64).powi(3) / 1e9;
        let mut rates = Vec::new();
        let mut cpu_rates = Vec::new();
        for _ in 0..repeats {
            let start = Instant::now();
            let cpu0 = cpu_seconds(libc::CLOCK_PROCESS_CPUTIME_ID);
            let c = a.clone().matmul(b.clone());
            let _ = c.into_data();
            rates.push(flop / start.elapsed().as_secs_f64());
            cpu_rates.push(flop / (cpu_seconds(libc::CLOCK_PROCESS_CPUTIME_ID) - cpu0));
        }
        Rate {
            wall: median(&rates),
            cpu: median(&cpu_rates),
        }
    })
}

/// The same network, forward only, in plain Rust (row by row, f32).
fn reference_forward(weights: &[LayerWeights], x: &[f32], out: &mut Vec<f32>) {
    let last = weights.len() - 1;
    let mut h: Vec<f32> = Vec::new();
    let mut next: Vec<f32> = Vec::new();
    out.clear();
    for row in x.chunks_exact(weights[0].inputs) {
        h.clear();
        h.extend_from_slice(row);
        for (i, lw) in weights.iter().enumerate() {
            next.clear();
            next.extend_from_slice(&lw.bias);
            for (k, hk) in h.iter().enumerate() {
                let w = &lw.weight[k * lw.outputs..(k + 1) * lw.outputs];
                for (n, wv) in next.iter_mut().zip(w) {
                    *n += hk * wv;
                }
            }
            if i < last {
                for n in next.iter_mut() {
                    *n = n.max(0.0);
                }
            }
            std::mem::swap(&mut h, &mut next);
        }
        out.push(h[0]);
    }
}

/// Minor page faults of the process so far.
fn minor_faults() -> f64 {
    // SAFETY: getrusage fills the zeroed struct passed to it.
    let mut u: libc::rusage = unsafe { std::mem::zeroed() };
    unsafe { libc::getrusage(libc::RUSAGE_SELF, &mut u) };
    u.ru_minflt as f64
}

/// Child-process mode for the allocator figure: one tidegate run; prints
/// rows/s, rows per CPU-second and minor page faults per epoch.
fn child(st: &Setup, batch: usize, lr: f64) {
    let before = minor_faults();
    let (s, _) = tidegate_run(st, Backend::Flex, 64, Activation::Relu, batch, lr);
    let faults = (minor_faults() - before) / st.epochs as f64;
    println!("{} {} {}", s.rate, s.cpu_rate, faults);
}

/// Runs `child` in a new process of this program with `env` added; returns
/// its three figures (NaN when the child failed).
fn run_child(epochs: usize, n: usize, batch: usize, env: &[(&str, &str)]) -> [f64; 3] {
    let exe = std::env::current_exe().expect("own path");
    let mut cmd = Command::new(exe);
    cmd.args([
        "--child".to_string(),
        epochs.to_string(),
        n.to_string(),
        batch.to_string(),
    ]);
    cmd.env_remove("MALLOC_MMAP_THRESHOLD_")
        .env_remove("MALLOC_TRIM_THRESHOLD_");
    for (k, v) in env {
        cmd.env(k, v);
    }
    let out = cmd.output().expect("child runs");
    let text = String::from_utf8_lossy(&out.stdout);
    let mut v = text
        .split_whitespace()
        .map(|w| w.parse().unwrap_or(f64::NAN));
    [(); 3].map(|_| v.next().unwrap_or(f64::NAN))
}

fn setup(epochs: usize, n: usize) -> Setup {
    let (schema, rows) = data(n, 1);
    let spec = FeatureSpec::new(
        &schema,
        &ColumnStats::of_rows(&schema, &rows),
        &Vocabularies::new(),
    );
    Setup { spec, rows, epochs }
}

pub fn main() {
    let mut args: Vec<String> = std::env::args().skip(1).collect();
    if args.first().is_some_and(|a| a == "--child") {
        let num = |i: usize| args[i].parse::<usize>().expect("number");
        let (epochs, n, batch) = (num(1), num(2), num(3));
        child(&setup(epochs, n), batch, 1e-3 * batch as f64 / 256.0);
        return;
    }
    let quick = args.iter().any(|a| a == "--quick");
    args.retain(|a| a != "--quick");
    let epochs: usize = args
        .first()
        .and_then(|a| a.parse().ok())
        .unwrap_or(if quick { 3 } else { 7 });
    let n: usize = args.get(1).and_then(|a| a.parse().ok()).unwrap_or(100_000);
    let filter = args.get(2).cloned().unwrap_or_default();
    let want = |name: &str| name.contains(&filter);
    let st = setup(epochs, n);
    let alloc = if choice() == MIMALLOC {
        "mimalloc"
    } else {
        "glibc"
    };
    println!(
        "rows {n}, epochs {epochs} (medians over epochs), validation {}%, allocator {alloc}, threads {}, quick {quick}",
        VALIDATION * 100.0,
        rayon::current_num_threads()
    );
    println!(
        "| figure | value | unit | reference | reference value | ratio | target | met |\n|---|---|---|---|---|---|---|---|"
    );
    let train_rows = n - (n as f64 * VALIDATION).round() as usize;
    let all_x = st.spec.encode_inputs(&st.rows);
    let all_y: Vec<f32> = {
        let y = st.spec.encode_targets(&st.rows);
        let mean = y.iter().map(|&v| f64::from(v)).sum::<f64>() / y.len() as f64;
        let var = y
            .iter()
            .map(|&v| (f64::from(v) - mean).powi(2))
            .sum::<f64>()
            / y.len() as f64;
        y.iter()
            .map(|&v| ((f64::from(v) - mean) / var.sqrt()) as f32)
            .collect()
    };
    let (px, py) = (&all_x[..train_rows * INPUTS], &all_y[..train_rows]);

    // Peak first: it is the denominator of the share figures.
    let threads = rayon::current_num_threads();
    let peak1 = gemm_peak(1024, 1, 9);
    let peak_all = gemm_peak(1024, threads, 9);
    // The largest product of the 256-wide network at batch 256 is 256³;
    // smaller sizes can beat 1024³ per CPU-second, so the peak is the best
    // of all three.
    let peak256 = gemm_peak(256, 1, 41);
    let peak512 = gemm_peak(512, 1, 21);
    let peak = Rate {
        wall: [peak_all.wall, peak1.wall, peak256.wall, peak512.wall]
            .into_iter()
            .fold(0.0, f64::max),
        cpu: [peak1.cpu, peak256.cpu, peak512.cpu]
            .into_iter()
            .fold(0.0, f64::max),
    };
    for (name, v, rname, r) in [
        (
            "gemm f32 1024^3 flex, all threads",
            peak_all.wall,
            "same, 1 thread",
            peak1.wall,
        ),
        (
            "gemm f32 1024^3 flex, 1 thread, per CPU-s",
            peak1.cpu,
            "same, by the wall clock",
            peak1.wall,
        ),
        (
            "gemm f32 512^3 flex, 1 thread, per CPU-s",
            peak512.cpu,
            "gemm 1024^3, 1 thread, per CPU-s",
            peak1.cpu,
        ),
        (
            "gemm f32 256^3 flex, 1 thread, per CPU-s",
            peak256.cpu,
            "gemm 1024^3, 1 thread, per CPU-s",
            peak1.cpu,
        ),
        (
            "gemm peak (best of the above), per CPU-s",
            peak.cpu,
            "best by the wall clock",
            peak.wall,
        ),
    ] {
        print_fig(
            Fig {
                name,
                value: v,
                unit: "GFLOP/s",
                reference: rname,
                reference_value: r,
                target: None,
            },
            &filter,
        );
    }

    let mut small_relu = None;
    let mut first_model = None;
    for hidden in [64, 256] {
        let plain = if want(&format!("{hidden}-wide")) {
            plain_burn(px, py, hidden, false, 256, epochs)
        } else {
            NO_RATE
        };
        let flop_per_row = 6.0 * weight_count(hidden) as f64 / 1e9;
        for backend in [Backend::Flex, Backend::Ndarray] {
            let name = format!("train {backend:?} relu {hidden}-wide b256").to_lowercase();
            if !want(&name) || (quick && hidden == 256 && backend == Backend::Ndarray) {
                continue;
            }
            let (s, model) = tidegate_run(&st, backend, hidden, Activation::Relu, 256, 1e-3);
            let small = (hidden == 64).then_some(Target::ValueAtLeast(1.5e6));
            print_fig(
                Fig {
                    name: &name,
                    value: s.rate,
                    unit: "rows/s",
                    reference: "plain burn-flex loop, 1 thread",
                    reference_value: plain.wall,
                    target: small,
                },
                &filter,
            );
            print_fig(
                Fig {
                    name: &format!("{name}, per CPU-s"),
                    value: s.cpu_rate,
                    unit: "rows/CPU-s",
                    reference: "plain burn-flex loop, 1 thread, per CPU-s",
                    reference_value: plain.cpu,
                    target: small,
                },
                &filter,
            );
            let big = (hidden == 256).then_some(Target::RatioAtLeast(0.5));
            print_fig(
                Fig {
                    name: &format!("share of peak {backend:?} {hidden}-wide b256").to_lowercase(),
                    value: s.rate * flop_per_row,
                    unit: "GFLOP/s",
                    reference: "gemm peak, wall clock",
                    reference_value: peak.wall,
                    target: big,
                },
                &filter,
            );
            print_fig(
                Fig {
                    name: &format!("share of peak {backend:?} {hidden}-wide b256, per CPU-s")
                        .to_lowercase(),
                    value: s.cpu_rate * flop_per_row,
                    unit: "GFLOP/CPU-s",
                    reference: "gemm peak, per CPU-s",
                    reference_value: peak.cpu,
                    target: big,
                },
                &filter,
            );
            if hidden == 64 && backend == Backend::Flex {
                small_relu = Some(s);
                first_model = Some(model);
            }
        }
        if hidden == 256 && want("plain share of peak 256") {
            print_fig(
                Fig {
                    name: "plain share of peak 256-wide b256, per CPU-s",
                    value: plain.cpu * flop_per_row,
                    unit: "GFLOP/CPU-s",
                    reference: "gemm peak, per CPU-s",
                    reference_value: peak.cpu,
                    target: None,
                },
                &filter,
            );
        }
    }

    let base = small_relu
        .unwrap_or_else(|| tidegate_run(&st, Backend::Flex, 64, Activation::Relu, 256, 1e-3).0);
    // Larger batches, learning rate scaled linearly from 1e-3 at 256.
    let batches: &[usize] = if quick { &[1024] } else { &[512, 1024, 2048] };
    for &batch in batches {
        let name = format!("train flex relu 64-wide b{batch}");
        if !want(&name) && !want("val mse") {
            continue;
        }
        let lr = 1e-3 * batch as f64 / 256.0;
        let (s, _) = tidegate_run(&st, Backend::Flex, 64, Activation::Relu, batch, lr);
        print_fig(
            Fig {
                name: &format!("{name} lr {lr}"),
                value: s.rate,
                unit: "rows/s",
                reference: "tidegate b256",
                reference_value: base.rate,
                target: Some(Target::ValueAtLeast(1.5e6)),
            },
            &filter,
        );
        print_fig(
            Fig {
                name: &format!("{name} lr {lr}, per CPU-s"),
                value: s.cpu_rate,
                unit: "rows/CPU-s",
                reference: "tidegate b256, per CPU-s",
                reference_value: base.cpu_rate,
                target: Some(Target::ValueAtLeast(1.5e6)),
            },
            &filter,
        );
        if want("plain") || filter.is_empty() {
            let plain = plain_burn(px, py, 64, false, batch, epochs);
            print_fig(
                Fig {
                    name: &format!("plain burn-flex loop 64-wide b{batch}, per CPU-s"),
                    value: plain.cpu,
                    unit: "rows/CPU-s",
                    reference: "tidegate same batch, per CPU-s",
                    reference_value: s.cpu_rate,
                    target: None,
                },
                &filter,
            );
        }
        print_fig(
            Fig {
                name: &format!("val mse after {epochs} epochs b{batch}"),
                value: s.val,
                unit: "MSE",
                reference: "tidegate b256",
                reference_value: base.val,
                target: None,
            },
            &filter,
        );
    }

    // Allocator: runs at the default batch and at 1024 in child processes.
    let alloc_batches: &[usize] = if quick { &[256] } else { &[256, 1024] };
    for &b in alloc_batches.iter().filter(|_| want("allocator")) {
        let tuned = [
            ("TIDEGATE_BENCH_ALLOC", "glibc"),
            ("MALLOC_MMAP_THRESHOLD_", "33554432"),
            ("MALLOC_TRIM_THRESHOLD_", "268435456"),
        ];
        let mut glibc = Vec::new();
        let mut glibc_tuned = Vec::new();
        let mut mimalloc = Vec::new();
        // Interleaved, so load changes hit all three alike.
        for _ in 0..if quick { 1 } else { 2 } {
            glibc.push(run_child(
                epochs,
                n,
                b,
                &[("TIDEGATE_BENCH_ALLOC", "glibc")],
            ));
            glibc_tuned.push(run_child(epochs, n, b, &tuned));
            mimalloc.push(run_child(
                epochs,
                n,
                b,
                &[("TIDEGATE_BENCH_ALLOC", "mimalloc")],
            ));
        }
        let pick =
            |runs: &[[f64; 3]], i: usize| median(&runs.iter().map(|r| r[i]).collect::<Vec<_>>());
        let figures = [
            ("rows/s", 0, Some(Target::RatioAtLeast(1.0))),
            ("rows/CPU-s", 1, Some(Target::RatioAtLeast(1.0))),
            ("page faults/epoch", 2, None),
        ];
        for (unit, i, target) in figures {
            let g = pick(&glibc, i);
            print_fig(
                Fig {
                    name: &format!("allocator mimalloc, flex relu 64-wide b{b}, {unit}"),
                    value: pick(&mimalloc, i),
                    unit,
                    reference: "glibc malloc",
                    reference_value: g,
                    target,
                },
                &filter,
            );
            print_fig(
                Fig {
                    name: &format!("allocator glibc tuned (MALLOC_*), b{b}, {unit}"),
                    value: pick(&glibc_tuned, i),
                    unit,
                    reference: "glibc malloc",
                    reference_value: g,
                    target: None,
                },
                &filter,
            );
        }
    }

    // Two independent runs on two threads against one.
    if want("concurrent") {
        let b = 256;
        let one_cfg = train_cfg(Backend::Flex, b, 1e-3, epochs, 7);
        let net = net_config(64, Activation::Relu);

        let mut singles = Vec::new();
        let mut pairs = Vec::new();
        let mut cpu_singles = Vec::new();
        let mut cpu_pairs = Vec::new();
        for _ in 0..2 {
            let (one, _) = timed_train(&st, &net, &one_cfg, libc::CLOCK_THREAD_CPUTIME_ID);
            singles.push(one.rate);
            cpu_singles.push(one.cpu_rate);
            let both: Vec<RunStats> = std::thread::scope(|s| {
                let hs: Vec<_> = [7, 8]
                    .into_iter()
                    .map(|seed| {
                        let cfg = train_cfg(Backend::Flex, b, 1e-3, epochs, seed);
                        let (st, net) = (&st, &net);
                        s.spawn(move || timed_train(st, net, &cfg, libc::CLOCK_THREAD_CPUTIME_ID).0)
                    })
                    .collect();
                hs.into_iter().map(|h| h.join().expect("joins")).collect()
            });
            pairs.push(both.iter().map(|r| r.rate).sum::<f64>());
            cpu_pairs.push(both.iter().map(|r| r.cpu_rate).sum::<f64>());
        }
        print_fig(
            Fig {
                name: "concurrent 2 runs on 2 threads, flex relu 64-wide b256",
                value: median(&pairs),
                unit: "rows/s",
                reference: "1 run",
                reference_value: median(&singles),
                target: Some(Target::RatioAtLeast(1.8)),
            },
            &filter,
        );
        print_fig(
            Fig {
                name: "concurrent 2 runs on 2 threads, per thread CPU-s, summed",
                value: median(&cpu_pairs),
                unit: "rows/CPU-s",
                reference: "1 run",
                reference_value: median(&cpu_singles),
                target: Some(Target::RatioAtLeast(1.8)),
            },
            &filter,
        );
    }

    // tanh against ReLU: time per row, so the ratio is ReLU rate / tanh rate.
    if want("tanh") {
        let (t, _) = tidegate_run(&st, Backend::Flex, 64, Activation::Tanh, 256, 1e-3);
        print_fig(
            Fig {
                name: "tanh time per row, tidegate flex 64-wide b256",
                value: 1e6 / t.rate,
                unit: "us/row",
                reference: "tidegate relu",
                reference_value: 1e6 / base.rate,
                target: Some(Target::RatioAtMost(2.0)),
            },
            &filter,
        );
        print_fig(
            Fig {
                name: "tanh CPU time per row, tidegate flex 64-wide b256",
                value: 1e6 / t.cpu_rate,
                unit: "CPU-us/row",
                reference: "tidegate relu",
                reference_value: 1e6 / base.cpu_rate,
                target: Some(Target::RatioAtMost(2.0)),
            },
            &filter,
        );
        let plain_tanh = plain_burn(px, py, 64, true, 256, epochs);
        let plain_relu = plain_burn(px, py, 64, false, 256, epochs);
        print_fig(
            Fig {
                name: "tanh CPU time per row, burn's tanh in the plain loop",
                value: 1e6 / plain_tanh.cpu,
                unit: "CPU-us/row",
                reference: "plain loop relu",
                reference_value: 1e6 / plain_relu.cpu,
                target: None,
            },
            &filter,
        );
    }

    // Prediction with the first trained model against plain Rust.
    if want("predict") {
        let model = first_model
            .unwrap_or_else(|| tidegate_run(&st, Backend::Flex, 64, Activation::Relu, 256, 1e-3).1);
        let weights = model.weights();
        let mut reference = Vec::new();
        let mut ref_rates = Vec::new();
        for _ in 0..7 {
            let start = Instant::now();
            reference_forward(&weights, &all_x, &mut reference);
            ref_rates.push(n as f64 / start.elapsed().as_secs_f64());
        }
        let mut diff = 0.0f32;
        for backend in [Backend::Flex, Backend::Ndarray] {
            let mut rates = Vec::new();
            for _ in 0..7 {
                let start = Instant::now();
                let p = model.raw_outputs(&all_x, backend).expect("width matches");
                rates.push(n as f64 / start.elapsed().as_secs_f64());
                diff = p
                    .iter()
                    .zip(&reference)
                    .map(|(a, b)| (a - b).abs())
                    .fold(diff, f32::max);
            }
            print_fig(
                Fig {
                    name: &format!("predict {backend:?} 64-wide, all rows").to_lowercase(),
                    value: median(&rates),
                    unit: "rows/s",
                    reference: "plain Rust forward",
                    reference_value: median(&ref_rates),
                    target: None,
                },
                &filter,
            );
        }
        println!("largest difference backend vs plain Rust output: {diff:e}");
    }
}
