//! The prediction endpoint of the real `tidegate watch`, over loopback:
//! answers equal `tidegate predict` with the model each answer names, bad
//! requests get a 4xx naming the row, the column and the reason while the
//! daemon keeps answering, and moves of the serving model under a stream of
//! requests drop none. The load benchmark (`load`, ignored) prints
//! requests per second and latency while cycles run and the model moves.

use std::collections::{BTreeMap, BTreeSet};
use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::{Duration, Instant};

use serde_json::{Value, json};

use crate::daemon::{Watch, wait_daemon, watch_log};
use crate::support::{Env, code, stderr, stdout, tiny_rows};

/// A tiny state with a serving model and the endpoint on a port the system
/// picks; `extra` adds `[daemon]` keys.
fn env_with_endpoint(extra: &str) -> Env {
    Env::tiny_with_model_and(&format!(
        "[daemon]\nsettle_seconds = 0.2\nmin_new_rows = 1000000\nrescan_seconds = 1.0\npredict_addr = \"127.0.0.1:0\"\n{extra}\n"
    ))
}

/// The endpoint's address, from the daemon's log.
fn endpoint_addr(env: &Env) -> String {
    wait_daemon(env, 20, "the endpoint's address in the log", || {
        watch_log(env).contains("predictions on http://")
    });
    let log = watch_log(env);
    log.split("predictions on http://")
        .nth(1)
        .and_then(|r| r.split("/predict").next())
        .unwrap_or_else(|| panic!("no endpoint address in the log: {log}"))
        .to_string()
}

/// What `Client::exchange` says when no answer began.
const NO_STATUS: &str = "no status line";

/// One kept-alive HTTP/1.1 connection, written by hand.
struct Client {
    addr: String,
    conn: Option<BufReader<TcpStream>>,
    /// Requests sent again after the server closed a kept-alive
    /// connection; the load runs count them as dropped.
    resent: usize,
}

impl Client {
    fn new(addr: &str) -> Client {
        Client {
            addr: addr.to_string(),
            conn: None,
            resent: 0,
        }
    }

    /// Sends one request and reads its answer: status and body. Connects
    /// again when the server closed the previous connection.
    fn send(&mut self, method: &str, path: &str, body: &[u8]) -> std::io::Result<(u16, String)> {
        if self.conn.is_none() {
            let s = TcpStream::connect(&self.addr)?;
            s.set_nodelay(true)?;
            s.set_read_timeout(Some(Duration::from_secs(30)))?;
            self.conn = Some(BufReader::new(s));
        }
        let reused = self.conn.is_some();
        let result = self.exchange(method, path, body);
        if result.is_err() {
            self.conn = None;
        }
        match result {
            // A kept-alive connection the server closed while it was idle
            // (after `predict_timeout_seconds`): nothing of the request was
            // answered, so send it once more on a new connection, as HTTP
            // clients do.
            Err(e) if reused && e.to_string().contains(NO_STATUS) => {
                self.resent += 1;
                self.send(method, path, body)
            }
            other => other,
        }
    }

    fn exchange(
        &mut self,
        method: &str,
        path: &str,
        body: &[u8],
    ) -> std::io::Result<(u16, String)> {
        let conn = self.conn.as_mut().expect("connected");
        let mut req = format!(
            "{method} {path} HTTP/1.1\r\nHost: {}\r\nContent-Type: application/json\r\nContent-Length: {}\r\n\r\n",
            self.addr,
            body.len()
        )
        .into_bytes();
        req.extend_from_slice(body);
        conn.get_mut().write_all(&req)?;
        let mut line = String::new();
        conn.read_line(&mut line)?;
        let status: u16 = line
            .split_whitespace()
            .nth(1)
            .and_then(|c| c.parse().ok())
            .ok_or_else(|| std::io::Error::other(format!("{NO_STATUS}: {line:?}")))?;
        let (mut length, mut close) = (0usize, false);
        loop {
            line.clear();
            conn.read_line(&mut line)?;
            let h = line.trim().to_ascii_lowercase();
            if h.is_empty() {
                break;
            }
            if let Some(v) = h.strip_prefix("content-length:") {
                length = v.trim().parse().map_err(std::io::Error::other)?;
            }
            close |= h == "connection: close";
        }
        let mut body = vec![0u8; length];
        conn.read_exact(&mut body)?;
        if close {
            self.conn = None;
        }
        Ok((status, String::from_utf8_lossy(&body).into_owned()))
    }

    fn post(&mut self, body: &Value) -> (u16, Value) {
        let (status, text) = self
            .send("POST", "/predict", body.to_string().as_bytes())
            .unwrap();
        let v = serde_json::from_str(&text).unwrap_or_else(|e| panic!("{e}: {text}"));
        (status, v)
    }
}

/// The rows of `tiny_rows` as request rows (the target left out).
fn request_rows(from: usize, n: usize) -> Vec<Value> {
    tiny_rows(from, n)
        .lines()
        .skip(1)
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            json!({"count": f[0].parse::<f64>().unwrap(), "temp": f[1].parse::<f64>().unwrap(), "town": f[2]})
        })
        .collect()
}

/// What `tidegate predict --model ID` gives for the same rows.
fn predicted_by(env: &Env, model: &str, from: usize, n: usize) -> Vec<f64> {
    let input = env.dir.path().join(format!("req-{from}-{n}.csv"));
    let text: String = tiny_rows(from, n)
        .lines()
        .map(|l| l.rsplit_once(',').unwrap().0.to_string() + "\n")
        .collect();
    std::fs::write(&input, text).unwrap();
    let out = env.run(&[
        "predict",
        "--input",
        input.to_str().unwrap(),
        "--model",
        model,
        "--format",
        "jsonl",
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    stdout(&out)
        .lines()
        .map(|l| {
            serde_json::from_str::<Value>(l).unwrap()["predicted_y"]
                .as_f64()
                .unwrap()
        })
        .collect()
}

fn close(a: f64, b: f64) -> bool {
    // One row and a file of rows go through matrix products of different
    // shapes, so the last bits may differ (common practice, no source).
    (a - b).abs() <= 1e-5 * a.abs().max(b.abs()).max(1.0)
}

fn model_ids(state: &Path) -> Vec<String> {
    let mut ids: Vec<String> = std::fs::read_dir(state.join("models"))
        .unwrap()
        .filter_map(Result::ok)
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with('.'))
        .collect();
    ids.sort();
    ids
}

/// A new batch and a cycle (through the daemon when one runs), so that a
/// second model exists to move to; every model id, sorted.
fn with_second_model(env: &Env) -> Vec<String> {
    let file = env.dir.path().join("more.csv");
    std::fs::write(&file, tiny_rows(600, 200)).unwrap();
    assert_eq!(code(&env.ingest(&[file])), 0);
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let models = model_ids(&env.state());
    assert!(models.len() >= 2, "{models:?}");
    models
}

fn serving(env: &Env) -> String {
    std::fs::read_to_string(env.state().join("serving"))
        .unwrap()
        .trim()
        .to_string()
}

#[test]
fn answers_match_predict_and_name_the_serving_model() {
    let env = env_with_endpoint("");
    let watch = Watch::start(&env);
    let addr = endpoint_addr(&env);
    let mut client = Client::new(&addr);
    let m1 = serving(&env);
    let expected = predicted_by(&env, &m1, 700, 32);
    // One row, then 32 rows in one request, on the same kept-alive connection.
    let rows = request_rows(700, 32);
    let (status, one) = client.post(&json!({ "rows": [rows[0]] }));
    assert_eq!(status, 200, "{one}");
    assert_eq!(one["model"], m1.as_str());
    assert_eq!(one["target"], "y");
    let v = one["predictions"][0].as_f64().unwrap();
    assert!(close(v, expected[0]), "{v} vs {}", expected[0]);
    let (status, many) = client.post(&json!({ "rows": rows }));
    assert_eq!(status, 200, "{many}");
    let got: Vec<f64> = many["predictions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p.as_f64().unwrap())
        .collect();
    assert_eq!(got.len(), 32);
    for (g, e) in got.iter().zip(&expected) {
        assert!(close(*g, *e), "{g} vs {e}");
    }
    // A category value the model has not seen is scored and reported.
    let (status, new_town) =
        client.post(&json!({"rows": [{"count": 0.1, "temp": 5, "town": "Dunmore"}]}));
    assert_eq!(status, 200, "{new_town}");
    assert_eq!(new_town["unseen"]["town"][0], "Dunmore");
    // A rollback through the CLI moves the endpoint with it: first a
    // second model, from a cycle run through the daemon.
    let models = with_second_model(&env);
    let other = models
        .iter()
        .find(|m| **m != serving(&env))
        .unwrap()
        .clone();
    let out = env.run(&["rollback", "--to", &other, "--reason", "endpoint test"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(serving(&env), other);
    let (status, after) = client.post(&json!({ "rows": [rows[0]] }));
    assert_eq!(status, 200, "{after}");
    assert_eq!(after["model"], other.as_str(), "{}", watch_log(&env));
    let want = predicted_by(&env, &other, 700, 1)[0];
    assert!(close(after["predictions"][0].as_f64().unwrap(), want));
    let (status, text) = client.send("GET", "/predict/model", b"").unwrap();
    assert_eq!(status, 200);
    assert!(text.contains(&other), "{text}");
    let (code, _) = watch.stop();
    assert_eq!(code, 0, "{}", watch_log(&env));
}

#[test]
fn the_endpoint_is_off_unless_configured_and_waits_for_a_model() {
    // Off by default: no port, nothing in the log.
    let env = Env::tiny_with_model_and("[daemon]\nmin_new_rows = 1000000\n");
    let watch = Watch::start(&env);
    let (code, _) = watch.stop();
    assert_eq!(code, 0);
    assert!(
        !watch_log(&env).contains("predictions on"),
        "{}",
        watch_log(&env)
    );
    // On, before any model: a 503 that says why.
    let env = Env::with_config_text(&format!(
        "{}\n[daemon]\nmin_new_rows = 1000000\npredict_addr = \"127.0.0.1:0\"\n",
        crate::support::TINY_CONFIG
    ));
    let watch = Watch::start(&env);
    let mut client = Client::new(&endpoint_addr(&env));
    let (status, v) = client.post(&json!({"rows": [{"count": 0.1, "temp": 5, "town": "Arden"}]}));
    assert_eq!(status, 503, "{v}");
    assert!(
        v["error"].as_str().unwrap().contains("no model serves"),
        "{v}"
    );
    let (code, _) = watch.stop();
    assert_eq!(code, 0);
}

/// A bad request: body, status, row, column, words in the reason.
type BadCase<'a> = (Value, u16, Option<u64>, Option<&'a str>, &'a str);

#[test]
fn bad_requests_get_a_4xx_naming_the_row_column_and_reason() {
    let env = env_with_endpoint(
        "predict_max_rows = 4\npredict_max_body_bytes = 2048\npredict_timeout_seconds = 0.5",
    );
    let watch = Watch::start(&env);
    let addr = endpoint_addr(&env);
    let mut client = Client::new(&addr);
    let ok = json!({"count": 0.1, "temp": 5, "town": "Arden"});
    let with = |column: &str, value: Value| {
        let mut bad = ok.clone();
        bad[column] = value;
        json!({"rows": [ok.clone(), bad]})
    };
    let cases: Vec<BadCase> = vec![
        (
            with("temp", json!("warm")),
            400,
            Some(1),
            Some("temp"),
            "number",
        ),
        (with("temp", json!(99)), 400, Some(1), Some("temp"), "60"),
        (with("count", json!(-3)), 400, Some(1), Some("count"), "0"),
        (
            with("town", json!(true)),
            400,
            Some(1),
            Some("town"),
            "not a value",
        ),
        (with("town", json!([1])), 400, Some(1), Some("town"), "list"),
        (
            json!({"rows": [{"count": 0.1, "temp": 5}]}),
            400,
            None,
            None,
            "town",
        ),
        (
            json!({"rows": [{"count": 0.1, "temp": 5, "town": "Arden", "colour": "red"}]}),
            400,
            None,
            None,
            "colour",
        ),
        (
            json!({"rows": [ok.clone(), {"count": 0.1, "temp": 5}]}),
            400,
            Some(1),
            Some("town"),
            "missing",
        ),
        (json!({"rows": []}), 400, None, None, "empty"),
        (
            json!({"rows": vec![ok.clone(); 5]}),
            413,
            None,
            None,
            "predict_max_rows",
        ),
        (
            json!({"rows": [ok.clone()], "model": "m1"}),
            400,
            None,
            None,
            "unknown field",
        ),
    ];
    for (body, status, row, column, words) in &cases {
        // A fresh connection each time: a refused request may close its own.
        client.conn = None;
        let (got, v) = client.post(body);
        assert_eq!(got, *status, "{body}: {v}");
        let text = v.to_string();
        assert!(text.contains(words), "{body}: {v}");
        if let Some(c) = column {
            let named = v["problems"]
                .as_array()
                .is_some_and(|ps| ps.iter().any(|p| p["column"] == *c));
            assert!(named, "{body}: no problem names column {c}: {v}");
        }
        if let Some(r) = row {
            let rows: Vec<u64> = v["problems"]
                .as_array()
                .unwrap_or_else(|| panic!("no problems listed: {v}"))
                .iter()
                .filter_map(|p| p["row"].as_u64())
                .collect();
            assert_eq!(rows, vec![*r], "{body}: {v}");
        }
    }
    // Keys that do not match the columns are named as keys, with what the
    // endpoint expects (the target may be left out).
    client.conn = None;
    let (status, v) = client.post(&json!({"rows": [{"count": 0.1, "temp": 5}]}));
    assert_eq!(status, 400);
    let reason = v["problems"][0]["reason"].as_str().unwrap();
    for words in [
        "rows' keys",
        "missing column(s): town",
        "optionally the target y",
    ] {
        assert!(reason.contains(words), "{words:?} not in {reason}");
    }
    // Not JSON; a body over the byte limit; the wrong method and path.
    let (status, text) = client.send("POST", "/predict", b"{\"rows\": [").unwrap();
    assert_eq!(status, 400);
    assert!(text.contains("not JSON"), "{text}");
    let big = vec![b' '; 4096];
    client.conn = None;
    let (status, text) = client.send("POST", "/predict", &big).unwrap();
    assert_eq!(status, 413, "{text}");
    assert!(text.contains("predict_max_body_bytes"), "{text}");
    client.conn = None;
    let (status, _) = client.send("GET", "/predict", b"").unwrap();
    assert_eq!(status, 405);
    let (status, _) = client.send("POST", "/elsewhere", b"{}").unwrap();
    assert_eq!(status, 404);
    // A body that never finishes arriving: 408 after the timeout.
    let mut slow = TcpStream::connect(&addr).unwrap();
    slow.set_read_timeout(Some(Duration::from_secs(20)))
        .unwrap();
    slow.write_all(b"POST /predict HTTP/1.1\r\nHost: x\r\nContent-Length: 100\r\n\r\n{\"rows\"")
        .unwrap();
    let mut answer = String::new();
    let _ = slow.read_to_string(&mut answer);
    assert!(answer.starts_with("HTTP/1.1 408"), "{answer}");
    assert!(answer.contains("predict_timeout_seconds"), "{answer}");
    // A head that never finishes: the connection is closed, nothing hangs.
    let mut silent = TcpStream::connect(&addr).unwrap();
    silent
        .set_read_timeout(Some(Duration::from_secs(20)))
        .unwrap();
    silent
        .write_all(b"POST /predict HTTP/1.1\r\nHost:")
        .unwrap();
    let t = Instant::now();
    let mut rest = Vec::new();
    let _ = silent.read_to_end(&mut rest);
    assert!(t.elapsed() < Duration::from_secs(10), "{:?}", t.elapsed());
    // After all of it the daemon still answers.
    let (status, v) = client.post(&json!({ "rows": [ok] }));
    assert_eq!(status, 200, "{v}");
    let (code, _) = watch.stop();
    assert_eq!(code, 0, "{}", watch_log(&env));
}

/// What the request threads saw.
#[derive(Default)]
struct Tally {
    /// Latency of each answered request, in microseconds.
    latencies: Vec<u64>,
    /// Per model id: row index → value answered.
    answers: BTreeMap<String, BTreeMap<usize, f64>>,
    /// Requests without a 200 answer (a status or an I/O error), with why.
    dropped: Vec<String>,
}

/// Sends requests of `rows` rows from `threads` threads until `stop`; each
/// thread keeps one connection alive. Rows cycle through 200 fixed rows.
fn hammer(
    addr: &str,
    threads: usize,
    rows: usize,
    stop: &Arc<AtomicBool>,
    sent: &Arc<AtomicU64>,
) -> Vec<std::thread::JoinHandle<Tally>> {
    // Bodies made once, so the clients spend their share of the cores on
    // requests rather than on writing JSON.
    let pool = request_rows(700, 200);
    let bodies: Arc<Vec<String>> = Arc::new(
        (0..=200 - rows)
            .map(|first| json!({"rows": &pool[first..first + rows]}).to_string())
            .collect(),
    );
    (0..threads)
        .map(|t| {
            let (addr, stop, sent, bodies) =
                (addr.to_string(), stop.clone(), sent.clone(), bodies.clone());
            std::thread::spawn(move || {
                let mut client = Client::new(&addr);
                let mut tally = Tally::default();
                let mut k = t * 37;
                while !stop.load(Ordering::Relaxed) {
                    let first = k % bodies.len();
                    k += 1;
                    let body = &bodies[first];
                    sent.fetch_add(1, Ordering::Relaxed);
                    let t0 = Instant::now();
                    let resent = client.resent;
                    let answer = client.send("POST", "/predict", body.as_bytes());
                    if client.resent > resent {
                        tally.dropped.push("connection closed; sent again".into());
                    }
                    match answer {
                        Ok((200, text)) => {
                            tally.latencies.push(t0.elapsed().as_micros() as u64);
                            let v: Value = serde_json::from_str(&text).unwrap();
                            let model = v["model"].as_str().unwrap().to_string();
                            let values = tally.answers.entry(model).or_default();
                            for (i, p) in v["predictions"].as_array().unwrap().iter().enumerate() {
                                values.insert(first + i, p.as_f64().unwrap());
                            }
                        }
                        Ok((status, text)) => tally.dropped.push(format!("{status}: {text}")),
                        Err(e) => tally.dropped.push(format!("I/O: {e}")),
                    }
                }
                tally
            })
        })
        .collect()
}

fn join(handles: Vec<std::thread::JoinHandle<Tally>>) -> Tally {
    let mut all = Tally::default();
    for h in handles {
        let t = h.join().unwrap();
        all.latencies.extend(t.latencies);
        all.dropped.extend(t.dropped);
        for (m, values) in t.answers {
            all.answers.entry(m).or_default().extend(values);
        }
    }
    all
}

/// Every answer equals `predict` with the model it names.
fn check_answers(env: &Env, tally: &Tally) {
    for (model, values) in &tally.answers {
        let expected = predicted_by(env, model, 700, 200);
        for (i, v) in values {
            assert!(
                close(*v, expected[*i]),
                "model {model}, row {i}: answered {v}, predict gives {}",
                expected[*i]
            );
        }
    }
}

#[test]
fn moves_of_the_serving_model_drop_no_request() {
    let env = env_with_endpoint("");
    // A second model to move between.
    let models = with_second_model(&env);
    let watch = Watch::start(&env);
    let addr = endpoint_addr(&env);
    let stop = Arc::new(AtomicBool::new(false));
    let sent = Arc::new(AtomicU64::new(0));
    let handles = hammer(&addr, 3, 1, &stop, &sent);
    // Moves while requests stream in: manual rollbacks both ways, then a
    // cycle (trained on the worker; its decision moves the pointer or not).
    let mut moved = Vec::new();
    for k in 0..6 {
        let before = sent.load(Ordering::Relaxed);
        wait_daemon(&env, 20, "requests between moves", || {
            sent.load(Ordering::Relaxed) >= before + 20
        });
        let to = &models[k % 2];
        if serving(&env) == *to {
            continue;
        }
        let out = env.run(&["rollback", "--to", to, "--reason", "move under load"]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        moved.push(to.clone());
    }
    let file = env.dir.path().join("later.csv");
    std::fs::write(&file, tiny_rows(800, 200)).unwrap();
    assert_eq!(code(&env.ingest(&[file])), 0);
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let before = sent.load(Ordering::Relaxed);
    wait_daemon(&env, 20, "requests after the cycle", || {
        sent.load(Ordering::Relaxed) >= before + 20
    });
    stop.store(true, Ordering::Relaxed);
    let tally = join(handles);
    assert!(moved.len() >= 4, "{moved:?}");
    assert!(
        tally.dropped.is_empty(),
        "{} dropped: {:?}",
        tally.dropped.len(),
        &tally.dropped[..tally.dropped.len().min(5)]
    );
    let seen: BTreeSet<&String> = tally.answers.keys().collect();
    assert!(seen.len() >= 2, "answers named only {seen:?}");
    check_answers(&env, &tally);
    // The endpoint ends on the model the audit log says serves.
    let mut client = Client::new(&addr);
    let (status, v) = client.post(&json!({"rows": [request_rows(700, 1)[0]]}));
    assert_eq!(status, 200);
    assert_eq!(v["model"], serving(&env).as_str());
    let (code, _) = watch.stop();
    assert_eq!(code, 0, "{}", watch_log(&env));
}

fn quantile(sorted: &[u64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let i = ((sorted.len() - 1) as f64 * q).round() as usize;
    sorted[i] as f64 / 1000.0
}

/// Runs `hammer` for `seconds` and prints one line of figures.
fn measure(
    addr: &str,
    label: &str,
    rows: usize,
    seconds: f64,
    busy: Option<&dyn Fn()>,
) -> (f64, Tally) {
    let stop = Arc::new(AtomicBool::new(false));
    let sent = Arc::new(AtomicU64::new(0));
    let t0 = Instant::now();
    let handles = hammer(addr, 4, rows, &stop, &sent);
    match busy {
        Some(work) => {
            while t0.elapsed().as_secs_f64() < seconds {
                work();
            }
        }
        None => std::thread::sleep(Duration::from_secs_f64(seconds)),
    }
    stop.store(true, Ordering::Relaxed);
    let mut tally = join(handles);
    let took = t0.elapsed().as_secs_f64();
    tally.latencies.sort_unstable();
    let rps = tally.latencies.len() as f64 / took;
    println!(
        "{label:<34} {rows:>2} rows/request: {rps:>8.0} requests/s ({:>8.0} rows/s), p50 {:.3} ms, p99 {:.3} ms, dropped {} of {}",
        rps * rows as f64,
        quantile(&tally.latencies, 0.5),
        quantile(&tally.latencies, 0.99),
        tally.dropped.len(),
        sent.load(Ordering::Relaxed)
    );
    (rps, tally)
}

/// The load benchmark: `cargo test --release --test it endpoint::load --
/// --ignored --nocapture`. Four client threads on kept-alive connections
/// (on the same 2 cores as the daemon), 1 and 32 rows per request, first
/// with the daemon idle (the reference), then while cycles train and the
/// serving model moves (rollbacks between two models).
#[test]
#[ignore]
fn load() {
    let seconds: f64 = std::env::var("TIDEGATE_LOAD_SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(10.0);
    // Cycles long enough to overlap the measurement.
    let env = env_with_endpoint("");
    let models = with_second_model(&env);
    let watch = Watch::start(&env);
    let addr = endpoint_addr(&env);
    let next_batch = std::cell::Cell::new(1000usize);
    let moves = std::cell::Cell::new(0usize);
    let cycles = std::cell::Cell::new(0usize);
    let busy = || {
        // A new batch and a cycle (with the cold candidate, so it trains
        // for a while), then a move of the serving model.
        let from = next_batch.get();
        next_batch.set(from + 200);
        let file = env.dir.path().join(format!("load-{from}.csv"));
        std::fs::write(&file, tiny_rows(from, 200)).unwrap();
        assert_eq!(code(&env.ingest(&[file])), 0);
        let out = env.run(&["retrain", "--cold"]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        cycles.set(cycles.get() + 1);
        let current = serving(&env);
        let to = models.iter().find(|m| **m != current).unwrap();
        let out = env.run(&["rollback", "--to", to, "--reason", "load test"]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        moves.set(moves.get() + 1);
    };
    println!("# prediction endpoint on loopback, 4 client threads, {seconds} s each");
    let mut dropped = 0;
    let mut all = Vec::new();
    for rows in [1usize, 32] {
        let (idle, t) = measure(&addr, "idle daemon (reference)", rows, seconds, None);
        dropped += t.dropped.len();
        let (load, t) = measure(
            &addr,
            "cycles training, model moving",
            rows,
            seconds,
            Some(&busy),
        );
        dropped += t.dropped.len();
        println!("  ratio under load / idle: {:.2}", load / idle);
        all.push(t);
    }
    println!(
        "# {} cycles and {} moves of the serving model during the loaded runs; dropped requests in all runs: {dropped}",
        cycles.get(),
        moves.get()
    );
    for t in &all {
        check_answers(&env, t);
    }
    let (code, _) = watch.stop();
    assert_eq!(code, 0, "{}", watch_log(&env));
    assert_eq!(dropped, 0);
}
