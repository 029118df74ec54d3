//! The daemon's online prediction endpoint: `POST /predict` with
//! `{"rows": [...]}` answers the serving model's predictions, naming the
//! model that answered. It owns the HTTP server (hyper on a small tokio
//! runtime of its own; the only user of hyper and tokio) and the slot that
//! holds the model in service.
//!
//! The slot is swapped, never emptied, when the serving pointer moves: a
//! request takes the model that is in the slot when it starts and finishes
//! with it, so a promotion or rollback drops no request, and the answer's
//! `model` is the version that computed it. Rows are parsed and predicted
//! by `scoring::Scorer`, the code behind `tidegate predict`.

pub mod request;

use std::convert::Infallible;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, RwLock};
use std::time::Duration;

use http_body_util::{BodyExt, Full, Limited};
use hyper::body::{Bytes, Incoming};
use hyper::header::{CONNECTION, CONTENT_LENGTH, CONTENT_TYPE, HeaderValue};
use hyper::server::conn::http1;
use hyper::service::service_fn;
use hyper::{Method, Request, Response, StatusCode};
use hyper_util::rt::{TokioIo, TokioTimer};
use serde_json::{Value, json};

use crate::config::{Config, DaemonConfig};
use crate::ids::ModelId;
use crate::scoring::Scorer;
use request::Refused;

/// Connections open at once; one more is closed unanswered, so a crowd of
/// idle clients cannot hold every thread or socket.
const MAX_CONNECTIONS: usize = 256;

/// Worker threads of the endpoint's runtime. Scoring a small request takes
/// microseconds of CPU; two threads keep the endpoint answering while one
/// request waits on its body, without taking cores from training.
const WORKERS: usize = 2;

/// What the endpoint holds: the model in service, or why there is none.
enum Holding {
    Model(Arc<Scorer>),
    Nothing(String),
}

/// The model in service, shared by the requests and the daemon's loop.
pub struct Slot {
    holding: RwLock<Holding>,
    /// Requests answered with a prediction, and requests refused, since start.
    answered: AtomicU64,
    refused: AtomicU64,
}

impl Slot {
    pub fn new() -> Arc<Slot> {
        Arc::new(Slot {
            holding: RwLock::new(Holding::Nothing(
                "no model serves yet; train one first".into(),
            )),
            answered: AtomicU64::new(0),
            refused: AtomicU64::new(0),
        })
    }

    /// The model in service now (a request keeps this one to the end).
    pub fn current(&self) -> Result<Arc<Scorer>, String> {
        match &*self.holding.read().unwrap_or_else(|e| e.into_inner()) {
            Holding::Model(m) => Ok(m.clone()),
            Holding::Nothing(why) => Err(why.clone()),
        }
    }

    fn put(&self, holding: Holding) {
        *self.holding.write().unwrap_or_else(|e| e.into_inner()) = holding;
    }

    /// Requests answered with predictions, and refused (any 4xx or 5xx).
    pub fn counts(&self) -> (u64, u64) {
        (
            self.answered.load(Ordering::Relaxed),
            self.refused.load(Ordering::Relaxed),
        )
    }
}

/// Keeps the slot on the serving model: the daemon's loop calls `follow`
/// with the serving model it folded from the audit log.
pub struct Follower {
    slot: Arc<Slot>,
    models: PathBuf,
    config: Config,
    /// The serving model last seen (loaded or not).
    seen: Option<ModelId>,
}

impl Follower {
    pub fn new(slot: Arc<Slot>, models: PathBuf, config: Config) -> Follower {
        Follower {
            slot,
            models,
            config,
            seen: None,
        }
    }

    /// Loads `serving` when it is not the model last seen, then swaps it in.
    /// Loading happens before the swap, so requests keep being answered by
    /// the previous model until the new one is ready. A model that cannot
    /// be loaded leaves the slot empty with the reason, so no request is
    /// answered by a model the audit log says no longer serves.
    pub fn follow(&mut self, serving: Option<ModelId>) {
        if serving == self.seen {
            return;
        }
        self.seen = serving;
        let Some(id) = serving else {
            self.slot.put(Holding::Nothing(
                "no model serves yet; train one first".into(),
            ));
            return;
        };
        match Scorer::load(&self.models, &self.config, id) {
            Ok(scorer) => {
                self.slot.put(Holding::Model(Arc::new(scorer)));
                tracing::info!("prediction endpoint: model {id} answers from now on");
            }
            Err(e) => {
                tracing::warn!("prediction endpoint: cannot load serving model {id}: {e}");
                self.slot.put(Holding::Nothing(format!(
                    "the serving model {id} cannot be loaded ({e}); run `tidegate verify`"
                )));
            }
        }
    }
}

/// The endpoint's limits, from `[daemon]`.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    pub max_rows: usize,
    pub max_body_bytes: usize,
    /// Time to receive a request's head, and then its body.
    pub timeout: Duration,
}

impl Limits {
    pub fn of(d: &DaemonConfig) -> Limits {
        Limits {
            max_rows: d.predict_max_rows,
            max_body_bytes: d.predict_max_body_bytes,
            timeout: Duration::from_secs_f64(d.predict_timeout_seconds),
        }
    }
}

/// Binds `addr` and serves the endpoint on threads of its own until the
/// process ends. Returns the bound address (the port, when `addr` asks the
/// system for one).
pub fn serve(addr: SocketAddr, slot: Arc<Slot>, limits: Limits) -> std::io::Result<SocketAddr> {
    let listener = std::net::TcpListener::bind(addr)?;
    listener.set_nonblocking(true)?;
    let bound = listener.local_addr()?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(WORKERS)
        .thread_name("predict")
        .enable_io()
        .enable_time()
        .build()?;
    std::thread::Builder::new()
        .name("predict-accept".into())
        .spawn(move || {
            runtime.block_on(async move {
                let listener = match tokio::net::TcpListener::from_std(listener) {
                    Ok(l) => l,
                    Err(e) => {
                        tracing::error!("prediction endpoint stopped: {e}");
                        return;
                    }
                };
                accept_loop(listener, slot, limits).await;
            })
        })?;
    Ok(bound)
}

async fn accept_loop(listener: tokio::net::TcpListener, slot: Arc<Slot>, limits: Limits) {
    let open = Arc::new(tokio::sync::Semaphore::new(MAX_CONNECTIONS));
    loop {
        let stream = match listener.accept().await {
            Ok((s, _)) => s,
            Err(e) => {
                // Out of file descriptors and the like: wait a little
                // rather than spin on the same error.
                tracing::warn!("prediction endpoint: accept failed: {e}");
                tokio::time::sleep(Duration::from_millis(50)).await;
                continue;
            }
        };
        let Ok(permit) = open.clone().try_acquire_owned() else {
            tracing::debug!("prediction endpoint: too many connections; one closed");
            continue;
        };
        let _ = stream.set_nodelay(true);
        let slot = slot.clone();
        tokio::spawn(async move {
            let service = service_fn(move |req| {
                let slot = slot.clone();
                async move { Ok::<_, Infallible>(handle(req, &slot, limits).await) }
            });
            // The head of each request (and the wait for the next one on a
            // kept-alive connection) must arrive within the timeout.
            let connection = http1::Builder::new()
                .timer(TokioTimer::new())
                .header_read_timeout(limits.timeout)
                .max_buf_size(64 * 1024)
                .serve_connection(TokioIo::new(stream), service);
            if let Err(e) = connection.await {
                tracing::debug!("prediction endpoint: connection ended: {e}");
            }
            drop(permit);
        });
    }
}

fn respond(status: u16, body: &Value) -> Response<Full<Bytes>> {
    let bytes = Bytes::from(body.to_string());
    let mut r = Response::new(Full::new(bytes));
    *r.status_mut() = StatusCode::from_u16(status).unwrap_or(StatusCode::INTERNAL_SERVER_ERROR);
    r.headers_mut()
        .insert(CONTENT_TYPE, HeaderValue::from_static("application/json"));
    r
}

fn refuse(slot: &Slot, refused: &Refused) -> Response<Full<Bytes>> {
    slot.refused.fetch_add(1, Ordering::Relaxed);
    let mut r = respond(refused.status, &refused.to_json());
    if matches!(refused.status, 408 | 413) {
        // The body was not read to its end: the connection cannot carry
        // another request, so say it closes.
        r.headers_mut()
            .insert(CONNECTION, HeaderValue::from_static("close"));
    }
    r
}

fn whole(status: u16, error: impl Into<String>) -> Refused {
    Refused {
        status,
        error: error.into(),
        problems: Vec::new(),
    }
}

async fn handle(req: Request<Incoming>, slot: &Slot, limits: Limits) -> Response<Full<Bytes>> {
    match (req.method(), req.uri().path()) {
        (&Method::POST, "/predict") => {}
        (&Method::GET, "/predict/model") => {
            let (answered, refused) = slot.counts();
            return match slot.current() {
                Ok(m) => respond(
                    200,
                    &json!({"model": m.id.to_string(), "answered": answered, "refused": refused}),
                ),
                Err(why) => refuse(slot, &whole(503, why)),
            };
        }
        (_, "/predict") => {
            let mut r = refuse(slot, &whole(405, "use POST with {\"rows\": [...]}"));
            r.headers_mut()
                .insert("allow", HeaderValue::from_static("POST"));
            return r;
        }
        (_, path) => {
            return refuse(
                slot,
                &whole(
                    404,
                    format!("no {path:?} here; POST /predict, or GET /predict/model"),
                ),
            );
        }
    }
    let too_large = || {
        whole(
            413,
            format!(
                "the body is over the limit of {} bytes ([daemon] predict_max_body_bytes); send fewer rows per request",
                limits.max_body_bytes
            ),
        )
    };
    // A declared length over the limit is refused before any byte is read.
    let declared = req
        .headers()
        .get(CONTENT_LENGTH)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.parse::<u64>().ok());
    if declared.is_some_and(|n| n > limits.max_body_bytes as u64) {
        return refuse(slot, &too_large());
    }
    let body = Limited::new(req.into_body(), limits.max_body_bytes);
    let bytes = match tokio::time::timeout(limits.timeout, body.collect()).await {
        Err(_) => {
            return refuse(
                slot,
                &whole(
                    408,
                    format!(
                        "the body did not arrive within {:.1} s ([daemon] predict_timeout_seconds)",
                        limits.timeout.as_secs_f64()
                    ),
                ),
            );
        }
        Ok(Err(e)) if e.is::<http_body_util::LengthLimitError>() => {
            return refuse(slot, &too_large());
        }
        Ok(Err(e)) => return refuse(slot, &whole(400, format!("cannot read the body: {e}"))),
        Ok(Ok(collected)) => collected.to_bytes(),
    };
    // The model is taken once: the whole request is answered by it even if
    // the serving model changes meanwhile.
    let scorer = match slot.current() {
        Ok(s) => s,
        Err(why) => return refuse(slot, &whole(503, why)),
    };
    match predict(&scorer, &bytes, limits.max_rows) {
        Ok(answer) => {
            slot.answered.fetch_add(1, Ordering::Relaxed);
            respond(200, &answer)
        }
        Err(refused) => refuse(slot, &refused),
    }
}

/// Scores a request body with one model: the answer, or why not.
pub fn predict(scorer: &Scorer, body: &[u8], max_rows: usize) -> Result<Value, Refused> {
    let rows = request::rows_to_csv(body, max_rows)?;
    let scored = match scorer.score_direct(&rows.bytes) {
        Err(e) => return Err(whole(500, format!("model {} failed: {e}", scorer.id))),
        Ok(Err(refusal)) => return Err(rows.refusal(&refusal)),
        Ok(Ok(s)) => s,
    };
    if scored.predictions.len() != rows.len() {
        return Err(whole(
            500,
            format!(
                "{} rows were sent but {} scored; nothing is answered",
                rows.len(),
                scored.predictions.len()
            ),
        ));
    }
    let unseen = scored
        .unseen
        .iter()
        .map(|(col, values)| (scorer.schema.columns[*col].name.clone(), values.clone()))
        .collect();
    Ok(request::answer(
        &scorer.id.to_string(),
        scorer.target_name(),
        &scored.predictions,
        &|c| scorer.class_name(c),
        &unseen,
    ))
}
