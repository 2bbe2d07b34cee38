//! The application: router, middleware, limits and graceful shutdown. `App::bind` can take port 0, so tests
//! start the real service on a free port.
//!
//! The request timeout and the admission limit (at most `max_concurrency` running, `max_queued` waiting,
//! 503 beyond) apply to the computing routes only: probes, /metrics and the documents must answer while the
//! service is saturated. POST /v1/batch is admitted too, but streams: it has no whole-request timeout or
//! whole-body limit, and applies both to each of its lines instead (`api::batch`).
//!
//! A computing request's body is read in full before it asks for a turn, within the body deadline and the
//! budget of body bytes in flight (`intake`); a batch's body is paced and budgeted as it streams. The
//! connections themselves (how many, how long a head or an idle wait may take, shutdown within the grace
//! period) are `connection`'s.

pub mod connection;
pub mod intake;

use crate::api::problem::{Problem, ProblemType};
use crate::api::{openapi, routes, Admitted, AppState};
use crate::config::{BatchLimits, ConnectionLimits, Options, ServiceLimits};
use crate::telemetry::metrics::{self, InFlight};
use axum::extract::{DefaultBodyLimit, MatchedPath, Request, State};
use axum::http::{header, HeaderName, HeaderValue, StatusCode};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::Router;
use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;
use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tower::ServiceBuilder;
use tower_http::catch_panic::CatchPanicLayer;
use tower_http::compression::CompressionLayer;
use tower_http::cors::{AllowOrigin, CorsLayer};
use tower_http::decompression::RequestDecompressionLayer;
use tower_http::limit::RequestBodyLimitLayer;
use tower_http::request_id::{MakeRequestUuid, PropagateRequestIdLayer, SetRequestIdLayer};
use tower_http::timeout::TimeoutLayer;
use tower_http::trace::TraceLayer;

pub fn router(opts: &Options) -> Router {
    router_with(opts, intake::Intake::new(opts))
}

fn router_with(opts: &Options, intake: Arc<intake::Intake>) -> Router {
    let state =
        AppState { limits: Arc::new(ServiceLimits::from_options(opts)), batch: BatchLimits::from_options(opts) };
    let request_id = HeaderName::from_static("x-request-id");
    let admission = Admission::new(opts.max_concurrency, opts.max_queued);
    // `route_layer` covers only the routes added before it: the computing ones. Reading the body and the
    // queued time count towards the timeout, so the timeout is the outermost; the body is read before the
    // request asks for a turn, so that a slow client holds none.
    let computing = Router::new()
        .route("/v1/tail", post(routes::tail::tail))
        .route("/v1/quantiles", post(routes::quantiles::quantiles))
        .route("/v1/distribution", post(routes::distribution::distribution))
        .route("/v1/layers", post(routes::layers::layers))
        .route("/v1/contributions", post(routes::contributions::contributions))
        .route("/v1/reverse-stress", post(routes::reverse_stress::reverse_stress))
        .route("/v1/chart", post(routes::chart::chart))
        .route_layer(
            ServiceBuilder::new()
                .layer(TimeoutLayer::with_status_code(StatusCode::REQUEST_TIMEOUT, opts.request_timeout()))
                .layer(middleware::from_fn_with_state(intake.clone(), intake::read_first))
                .layer(middleware::from_fn_with_state(admission.clone(), admit)),
        )
        .route("/", get(routes::page::explorer))
        .route("/healthz", get(routes::health::healthz))
        .route("/readyz", get(routes::health::readyz))
        .route("/metrics", get(routes::metrics::metrics))
        .route("/docs", get(routes::docs::docs))
        .route("/openapi.json", get(openapi_json))
        .layer(RequestBodyLimitLayer::new(opts.max_body_bytes));
    // A batch is admitted like any computing request but has neither the whole-request timeout nor the
    // whole-body limit: it streams, each line within the request timeout and the body limit, its body paced.
    let batch = Router::new().route("/v1/batch", post(routes::batch::batch)).route_layer(
        ServiceBuilder::new()
            .layer(middleware::from_fn_with_state(intake, intake::pace))
            .layer(middleware::from_fn_with_state(admission, admit)),
    );
    let api = computing.merge(batch).fallback(not_found).with_state(state);
    api.layer(
        ServiceBuilder::new()
            .layer(SetRequestIdLayer::new(request_id.clone(), MakeRequestUuid))
            .layer(PropagateRequestIdLayer::new(request_id))
            .layer(middleware::from_fn(record_metrics))
            .layer(TraceLayer::new_for_http())
            .layer(CatchPanicLayer::custom(|_| {
                Problem::internal("the computation failed unexpectedly").into_response()
            }))
            .layer(middleware::from_fn(problem_bodies))
            .layer(cors(&opts.cors_origins))
            .layer(CompressionLayer::new())
            .layer(RequestDecompressionLayer::new())
            .layer(DefaultBodyLimit::max(opts.max_body_bytes)),
    )
}

/// Counts each request once, with its final status and problem type: outside the panic catcher and the
/// problem-body rewriting, so both are seen as answered. `Router::layer` wraps each route, so the matched
/// template is known here.
async fn record_metrics(req: Request, next: Next) -> Response {
    let route = req.extensions().get::<MatchedPath>().map_or(metrics::UNMATCHED, |m| m.as_str());
    let flight = InFlight::start(route, metrics::method_label(req.method()));
    let res = next.run(req).await;
    flight.finish(res.status().as_u16(), res.extensions().get::<ProblemType>().map(|p| p.0.as_str()));
    res
}

/// Admission control of the computing routes: `running` turns, and `admitted` places (running plus
/// waiting). A request that finds no place is refused at once rather than queued without bound.
#[derive(Clone)]
struct Admission {
    running: Arc<Semaphore>,
    admitted: Arc<Semaphore>,
    max_queued: usize,
}

impl Admission {
    fn new(max_concurrency: usize, max_queued: usize) -> Admission {
        let cap = Semaphore::MAX_PERMITS;
        let running = max_concurrency.clamp(1, cap);
        Admission {
            running: Arc::new(Semaphore::new(running)),
            admitted: Arc::new(Semaphore::new(running.saturating_add(max_queued).min(cap))),
            max_queued,
        }
    }
}

async fn admit(State(a): State<Admission>, mut req: Request, next: Next) -> Response {
    let Ok(place) = a.admitted.clone().try_acquire_owned() else {
        let mut res = Problem::overloaded(format!(
            "all computing slots are busy and {} requests are waiting (see --max-concurrency, --max-queued); retry later",
            a.max_queued
        ))
        .into_response();
        res.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from_static("1"));
        return res;
    };
    let waiting = metrics::queued();
    let Ok(turn) = a.running.clone().acquire_owned().await else {
        return Problem::internal("admission control closed").into_response();
    };
    drop(waiting);
    // Held here until the answer is ready, and by a streaming answer until it ends.
    let admitted = Admitted(Arc::new((place, turn, metrics::computing())));
    req.extensions_mut().insert(admitted.clone());
    next.run(req).await
}

fn cors(origins: &str) -> CorsLayer {
    let base = CorsLayer::new()
        .allow_methods([axum::http::Method::GET, axum::http::Method::POST])
        .allow_headers([header::CONTENT_TYPE]);
    match origins.trim() {
        "" => base,
        "*" => base.allow_origin(AllowOrigin::any()),
        list => {
            base.allow_origin(list.split(',').filter_map(|o| HeaderValue::from_str(o.trim()).ok()).collect::<Vec<_>>())
        }
    }
}

async fn openapi_json() -> Response {
    let mut res = openapi::pretty_json().into_response();
    res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("application/json"));
    res
}

async fn not_found(uri: axum::http::Uri) -> Problem {
    Problem::not_found(uri.path())
}

/// Error answers produced by middleware (405, 408, 413 from the body limit, ...) come without a body or as
/// text; give every one the problem-details form the API promises.
async fn problem_bodies(req: Request, next: Next) -> Response {
    let res = next.run(req).await;
    let status = res.status();
    if !(status.is_client_error() || status.is_server_error()) {
        return res;
    }
    let is_problem =
        res.headers().get(header::CONTENT_TYPE).is_some_and(|v| v.as_bytes().starts_with(b"application/problem+json"));
    if is_problem {
        return res;
    }
    let p = match status {
        StatusCode::METHOD_NOT_ALLOWED => {
            Problem::new(status, "method-not-allowed", "Method not allowed", "this path does not accept that method")
        }
        StatusCode::REQUEST_TIMEOUT => Problem::new(
            status,
            "timeout",
            "Request timeout",
            "the request took longer than the configured timeout (see --request-timeout-secs, --request-timeout-ms)",
        ),
        StatusCode::PAYLOAD_TOO_LARGE => {
            Problem::too_large("the request body exceeds the configured limit (see --max-body-bytes)")
        }
        StatusCode::UNSUPPORTED_MEDIA_TYPE => Problem::unsupported_media("unsupported content encoding or type"),
        s if s.is_server_error() => Problem::internal("internal error"),
        s => Problem::new(s, "client-error", s.canonical_reason().unwrap_or("Client error"), "the request was refused"),
    };
    let mut out = p.into_response();
    for (k, v) in res.headers() {
        if k == header::CONTENT_TYPE || k == header::CONTENT_LENGTH {
            continue;
        }
        out.headers_mut().insert(k.clone(), v.clone());
    }
    out
}

/// What a reserved connection (one beyond --max-connections) answers: the probes and /metrics, and 503
/// to anything else, so that an orchestrator still sees the process alive when clients hold every
/// connection. Each such connection serves one request.
fn probes_router() -> Router {
    async fn busy() -> Response {
        let mut res =
            Problem::overloaded("every connection is taken (see --max-connections); only the probes answer now")
                .into_response();
        res.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from_static("1"));
        res
    }
    Router::new()
        .route("/healthz", get(routes::health::healthz))
        .route("/readyz", get(routes::health::readyz))
        .route("/metrics", get(routes::metrics::metrics))
        .fallback(busy)
}

/// A bound listener with its application, ready to serve.
pub struct App {
    listener: TcpListener,
    router: Router,
    limits: ConnectionLimits,
}

/// File descriptors kept for the listener, standard streams and the rest of the process.
const SPARE_FILES: usize = 64;

impl App {
    pub async fn bind(opts: &Options) -> std::io::Result<App> {
        let listener = TcpListener::bind(&opts.listen).await?;
        let mut limits = ConnectionLimits::from_options(opts);
        if let Some(files) = connection::fit_to_open_files(&mut limits, connection::open_files_limit(), SPARE_FILES) {
            tracing::warn!(
                open_files = files,
                max_connections = limits.max_connections,
                "the open files limit cannot hold --max-connections and --reserved-connections; connections lowered to fit (raise `ulimit -n`)"
            );
        }
        let intake = intake::Intake::new(opts);
        if opts.max_body_bytes > intake.budget_bytes() {
            tracing::warn!(
                max_body_bytes = opts.max_body_bytes,
                budget = intake.budget_bytes(),
                "--max-body-bytes exceeds the budget of body bytes in flight: larger bodies are refused with 413"
            );
        }
        Ok(App { listener, router: router_with(opts, intake), limits })
    }

    pub fn local_addr(&self) -> SocketAddr {
        self.listener.local_addr().expect("bound")
    }

    /// Serve until `shutdown` resolves; then stop accepting, let the requests in flight finish within the
    /// grace period (--shutdown-grace-secs), and abandon what remains.
    pub async fn serve(self, shutdown: impl Future<Output = ()> + Send + 'static) -> std::io::Result<()> {
        connection::serve(self.listener, self.router, probes_router(), self.limits, shutdown).await
    }
}

/// Resolves on SIGINT or SIGTERM.
pub async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        if let Ok(mut s) = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            s.recv().await;
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! { _ = ctrl_c => {}, _ = term => {} }
    tracing::info!("shutdown signal received: finishing requests in flight");
}
