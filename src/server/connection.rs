//! The accept loop and the life of each connection, in place of `axum::serve`, which has no place for the
//! limits below.
//!
//! - At most `max_connections` connections are served in full, and `reserved_connections` more answer only
//!   the probes and /metrics, one request each and with at most a second to send it: a client that opens
//!   thousands of connections takes the service's file descriptors no further, and the orchestrator still
//!   sees /healthz. When the reserved places are all taken, a newcomer that speaks takes the place of the
//!   oldest reserved connection that has sent nothing yet (a probe speaks at once, a flood of idle
//!   connections does not). Beyond that, a connection gets a best-effort 503 and is closed at once.
//! - Each connection has a watchdog: the request head must arrive within the header timeout (counted from
//!   the connection's start, or from the first byte of a later request), an idle keep-alive connection is
//!   closed after the keep-alive timeout, and a connection whose answer the client does not read (every
//!   write blocked) for the send timeout is closed. A connection is exempt from the first two while a
//!   request is being served: the body deadline, the request timeout and the admission control govern that.
//! - On shutdown the listener is closed at once, idle connections are closed, requests in flight have the
//!   grace period to finish; then the connections left are dropped, which drops their requests, and the
//!   computations behind them see their cancellation flag (`api::cancel`).

use crate::config::ConnectionLimits;
use crate::telemetry::metrics;
use axum::Router;
use hyper::body::Incoming;
use hyper::server::conn::http1;
use hyper_util::rt::TokioIo;
use std::convert::Infallible;
use std::future::Future;
use std::io;
use std::pin::Pin;
use std::sync::{Arc, LazyLock, Mutex, MutexGuard};
use std::task::{Context, Poll};
use std::time::Duration;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{watch, Notify, OwnedSemaphorePermit, Semaphore};
use tokio::task::JoinSet;
use tokio::time::Instant;
use tower::ServiceExt;

/// Serve `app` on the listener until `shutdown` resolves, then shut down within the grace period.
/// Connections beyond `max_connections` are served by `probes` (one request each) while reserved places last.
pub async fn serve(
    listener: TcpListener,
    app: Router,
    probes: Router,
    limits: ConnectionLimits,
    shutdown: impl Future<Output = ()> + Send,
) -> io::Result<()> {
    let limits = Arc::new(limits);
    let full = Arc::new(Semaphore::new(limits.max_connections.min(Semaphore::MAX_PERMITS)));
    let reserved = Arc::new(Reserved::new(limits.reserved_connections));
    let (stop, stopping) = watch::channel(());
    let mut conns = JoinSet::new();
    tokio::pin!(shutdown);
    loop {
        tokio::select! {
            biased;
            () = &mut shutdown => break,
            Some(_) = conns.join_next(), if !conns.is_empty() => {}
            accepted = listener.accept() => {
                let stream = match accepted {
                    Ok((stream, _)) => stream,
                    Err(e) => {
                        accept_error(e).await;
                        continue;
                    }
                };
                let _ = stream.set_nodelay(true);
                let (limits, stopping) = (limits.clone(), stopping.clone());
                if let Ok(place) = full.clone().try_acquire_owned() {
                    let conn = Conn { service: app.clone(), reserved: None, _place: place };
                    conns.spawn(conn.run(stream, limits, stopping));
                } else if let Ok(place) = reserved.places.clone().try_acquire_owned() {
                    let conn = Conn { service: probes.clone(), reserved: Some(reserved.clone()), _place: place };
                    conns.spawn(conn.run(stream, limits, stopping));
                } else if has_spoken(&stream) {
                    // Under a flood the request of a probe has arrived by the time it is accepted.
                    match reserved.evict_for_newcomer() {
                        Some(waiting) => {
                            conns.spawn(take_evicted_place(stream, waiting, reserved.clone(), probes.clone(), limits, stopping));
                        }
                        None => refuse(stream),
                    }
                } else if let Ok(listening) = reserved.listening.clone().try_acquire_owned() {
                    // Otherwise it is given a moment to speak.
                    let (reserved, probes) = (reserved.clone(), probes.clone());
                    conns.spawn(async move {
                        let readable = tokio::time::timeout(SPEAK_WAIT, stream.readable()).await;
                        // Readable may also mean that the client has gone.
                        let spoke = matches!(readable, Ok(Ok(()))) && has_spoken(&stream);
                        drop(listening);
                        let waiting = if spoke { reserved.evict_for_newcomer() } else { None };
                        match waiting {
                            Some(waiting) => take_evicted_place(stream, waiting, reserved, probes, limits, stopping).await,
                            None => refuse(stream),
                        }
                    });
                } else {
                    refuse(stream);
                }
            }
        }
    }
    drop(listener);
    let grace = limits.shutdown_grace;
    tracing::info!(
        connections = conns.len(),
        grace_secs = grace.as_secs_f64(),
        "listener closed; finishing the requests in flight"
    );
    let _ = stop.send(());
    let drained = tokio::time::timeout(grace, async { while conns.join_next().await.is_some() {} }).await.is_ok();
    if !drained {
        tracing::warn!(
            connections = conns.len(),
            "grace period over: closing the connections left and abandoning their work"
        );
        // Aborting drops each connection with its requests; a request's computation is told to stop when its
        // future is dropped. The tasks end at their next poll, so this wait is short.
        conns.abort_all();
        let _ = tokio::time::timeout(Duration::from_secs(2), async {
            while let Some(r) = conns.join_next().await {
                if r.is_err_and(|e| e.is_cancelled()) {
                    metrics::connection_closed("shutdown");
                }
            }
        })
        .await;
    }
    Ok(())
}

/// The file descriptors the process may open, when known (the soft RLIMIT_NOFILE, from /proc).
pub fn open_files_limit() -> Option<usize> {
    let text = std::fs::read_to_string("/proc/self/limits").ok()?;
    let line = text.lines().find(|l| l.starts_with("Max open files"))?;
    line["Max open files".len()..].split_whitespace().next()?.parse().ok()
}

/// Lower `max_connections` so that every connection, reserved ones and the newcomers waiting for one of
/// their places included, has a file descriptor, with `spare` left for the listener and the rest of the
/// process. Returns the limit it had to fit, if it did.
pub fn fit_to_open_files(limits: &mut ConnectionLimits, files: Option<usize>, spare: usize) -> Option<usize> {
    let files = files?;
    let others = limits.reserved_connections.saturating_mul(3).saturating_add(spare);
    if limits.max_connections.saturating_add(others) <= files {
        return None;
    }
    limits.max_connections = files.saturating_sub(others).max(1);
    Some(files)
}

/// How long a newcomer waits for the place of the reserved connection it evicted.
const EVICTION_WAIT: Duration = Duration::from_millis(200);

/// How long a newcomer that finds the reserved places taken may take to send its first byte.
const SPEAK_WAIT: Duration = Duration::from_millis(50);

/// Whether the client has sent something already (peeked, so hyper still reads it).
fn has_spoken(stream: &TcpStream) -> bool {
    let mut buf = [std::mem::MaybeUninit::<u8>::uninit(); 1];
    matches!(socket2::SockRef::from(stream).peek(&mut buf), Ok(n) if n > 0)
}

/// Serve a newcomer on the place of the reserved connection it evicted, once that one has given it back.
async fn take_evicted_place(
    stream: TcpStream,
    waiting: OwnedSemaphorePermit,
    reserved: Arc<Reserved>,
    probes: Router,
    limits: Arc<ConnectionLimits>,
    stopping: watch::Receiver<()>,
) {
    let place = tokio::time::timeout(EVICTION_WAIT, reserved.places.clone().acquire_owned()).await;
    drop(waiting);
    match place {
        Ok(Ok(place)) => {
            Conn { service: probes, reserved: Some(reserved), _place: place }.run(stream, limits, stopping).await
        }
        _ => refuse(stream),
    }
}

/// The reserved places, and the watchdogs of the connections on them (to pick one to evict).
///
/// When the places are all taken, a newcomer that speaks (at once, or within `SPEAK_WAIT`) may take the
/// place of the oldest one that has sent nothing; newcomers that say nothing are refused. Each kind of
/// newcomer in waiting is bounded by the number of places.
struct Reserved {
    places: Arc<Semaphore>,
    /// Newcomers waiting for an evicted place.
    waiting: Arc<Semaphore>,
    /// Newcomers given a moment to speak.
    listening: Arc<Semaphore>,
    live: Mutex<Vec<Arc<Watch>>>,
}

impl Reserved {
    fn new(n: usize) -> Reserved {
        let n = n.min(Semaphore::MAX_PERMITS);
        let sem = || Arc::new(Semaphore::new(n));
        Reserved { places: sem(), waiting: sem(), listening: sem(), live: Mutex::new(vec![]) }
    }

    fn live(&self) -> MutexGuard<'_, Vec<Arc<Watch>>> {
        self.live.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Tell the oldest reserved connection that has sent nothing to close, if there is one (and room for
    /// the newcomer to wait); the newcomer's waiting place.
    fn evict_for_newcomer(&self) -> Option<OwnedSemaphorePermit> {
        let waiting = self.waiting.clone().try_acquire_owned().ok()?;
        let live = self.live();
        let victim = live
            .iter()
            .filter_map(|w| {
                let p = w.phase();
                (p.busy == 0 && !p.answered && p.first_byte.is_none() && !p.evicted).then_some((p.since, w))
            })
            .min_by_key(|(since, _)| *since)
            .map(|(_, w)| w.clone())?;
        drop(live);
        victim.phase().evicted = true;
        victim.changed.notify_one();
        Some(waiting)
    }
}

/// Errors of one connection (its peer went away) are not the listener's; others (EMFILE, ENFILE, ENOBUFS)
/// pass when connections close, so the loop pauses briefly instead of spinning.
async fn accept_error(e: io::Error) {
    use io::ErrorKind::{ConnectionAborted, ConnectionRefused, ConnectionReset};
    if matches!(e.kind(), ConnectionAborted | ConnectionRefused | ConnectionReset) {
        return;
    }
    tracing::error!("accept error: {e}");
    tokio::time::sleep(Duration::from_millis(50)).await;
}

static REFUSAL: LazyLock<Vec<u8>> = LazyLock::new(|| {
    let body = br#"{"type":"/problems/overloaded","title":"Service overloaded","status":503,"detail":"every connection is taken (see --max-connections); retry later"}"#;
    let mut out = format!(
        "HTTP/1.1 503 Service Unavailable\r\ncontent-type: application/problem+json\r\nretry-after: 1\r\nconnection: close\r\ncontent-length: {}\r\n\r\n",
        body.len()
    )
    .into_bytes();
    out.extend_from_slice(body);
    out
});

/// No place left: a 503 if the socket takes it without waiting, then close.
fn refuse(stream: TcpStream) {
    metrics::connection_refused();
    let _ = stream.try_write(&REFUSAL);
}

/// The head timeout of a reserved connection: a probe sends its request at once, and a flood of idle
/// connections must not keep the reserved places for the full header timeout.
const RESERVED_HEAD_TIMEOUT: Duration = Duration::from_secs(1);

struct Conn {
    service: Router,
    /// The reserved places, for a connection on one of them.
    reserved: Option<Arc<Reserved>>,
    _place: OwnedSemaphorePermit,
}

/// Removes a reserved connection's watchdog from the list of candidates for eviction.
struct Listed(Arc<Reserved>, Arc<Watch>);

impl Drop for Listed {
    fn drop(&mut self) {
        self.0.live().retain(|w| !Arc::ptr_eq(w, &self.1));
    }
}

impl Conn {
    async fn run(self, stream: TcpStream, limits: Arc<ConnectionLimits>, mut stopping: watch::Receiver<()>) {
        let _open = metrics::connection_open(self.reserved.is_some());
        let watch = Arc::new(Watch::new());
        let (limits, _listed) = match self.reserved {
            Some(reserved) => {
                let head = limits.header_read_timeout.min(RESERVED_HEAD_TIMEOUT);
                reserved.live().push(watch.clone());
                (
                    Arc::new(ConnectionLimits { header_read_timeout: head, ..(*limits).clone() }),
                    Some(Listed(reserved, watch.clone())),
                )
            }
            None => (limits, None),
        };
        let keep_alive = _listed.is_none();
        let io = TokioIo::new(Watched { inner: stream, watch: watch.clone() });
        let (service, w) = (self.service, watch.clone());
        let service = hyper::service::service_fn(move |req: hyper::Request<Incoming>| {
            let busy = Busy::start(&w);
            let call = service.clone().oneshot(req.map(axum::body::Body::new));
            async move {
                let res = call.await.unwrap_or_else(|e: Infallible| match e {});
                Ok::<_, Infallible>(res.map(|inner| Tracked { inner, _busy: busy }))
            }
        });
        let mut builder = http1::Builder::new();
        // The watchdog keeps the time; hyper's own header timer would also cut idle keep-alive connections.
        builder.keep_alive(keep_alive).header_read_timeout(None);
        let conn = builder.serve_connection(io, service);
        tokio::pin!(conn);
        let mut stop_seen = false;
        loop {
            tokio::select! {
                _ = conn.as_mut() => break,
                _ = stopping.changed(), if !stop_seen => {
                    stop_seen = true;
                    conn.as_mut().graceful_shutdown();
                }
                reason = watch.expired(&limits) => {
                    metrics::connection_closed(reason);
                    tracing::debug!(reason, "closing a connection");
                    break;
                }
            }
        }
    }
}

/// What the watchdog of one connection knows: updated by the socket (reads, blocked writes) and by the
/// requests (`Busy`).
struct Watch {
    phase: Mutex<Phase>,
    changed: Notify,
}

struct Phase {
    /// Requests being served (at most one in HTTP/1.1, pipelining or not).
    busy: usize,
    /// When the connection became idle (accepted, or its last answer was sent).
    since: Instant,
    /// Whether a request has been answered on it (then an idle wait is a keep-alive wait).
    answered: bool,
    /// First byte read while idle: a request head is arriving.
    first_byte: Option<Instant>,
    /// Since when every write has been refused by the socket.
    send_blocked: Option<Instant>,
    /// Told to make room for a newcomer (a reserved connection that had sent nothing).
    evicted: bool,
}

impl Watch {
    fn new() -> Watch {
        let phase = Phase {
            busy: 0,
            since: Instant::now(),
            answered: false,
            first_byte: None,
            send_blocked: None,
            evicted: false,
        };
        Watch { phase: Mutex::new(phase), changed: Notify::new() }
    }

    fn phase(&self) -> MutexGuard<'_, Phase> {
        self.phase.lock().unwrap_or_else(|e| e.into_inner())
    }

    fn read(&self, n: usize) {
        if n == 0 {
            return;
        }
        let mut p = self.phase();
        if p.busy == 0 && p.first_byte.is_none() {
            p.first_byte = Some(Instant::now());
            drop(p);
            self.changed.notify_one();
        }
    }

    fn write(&self, blocked: bool) {
        let mut p = self.phase();
        match (blocked, p.send_blocked) {
            (true, None) => {
                p.send_blocked = Some(Instant::now());
                drop(p);
                self.changed.notify_one();
            }
            (false, Some(_)) => p.send_blocked = None,
            _ => {}
        }
    }

    /// The earliest limit that applies now, and its name.
    fn deadline(&self, l: &ConnectionLimits) -> Option<(Instant, &'static str)> {
        let p = self.phase();
        if p.evicted {
            return Some((Instant::now(), "evicted"));
        }
        let head = (p.busy == 0).then(|| match p.first_byte {
            Some(t) => (t + l.header_read_timeout, "header-timeout"),
            None if p.answered => (p.since + l.keep_alive_timeout, "keep-alive-timeout"),
            None => (p.since + l.header_read_timeout, "header-timeout"),
        });
        let send = p.send_blocked.map(|t| (t + l.send_timeout, "send-timeout"));
        match (head, send) {
            (Some(h), Some(s)) => Some(if s.0 < h.0 { s } else { h }),
            (h, s) => h.or(s),
        }
    }

    /// Resolves with the reason once a limit has passed.
    async fn expired(&self, l: &ConnectionLimits) -> &'static str {
        loop {
            // Taken before reading the state: a change made meanwhile leaves a permit, so it is not missed.
            let changed = self.changed.notified();
            match self.deadline(l) {
                Some((at, why)) if at <= Instant::now() => return why,
                Some((at, _)) => {
                    tokio::select! {
                        () = tokio::time::sleep_until(at) => {}
                        () = changed => {}
                    }
                }
                None => changed.await,
            }
        }
    }
}

/// A request in service on the connection, from its head until its answer's last byte is handed to hyper.
struct Busy(Arc<Watch>);

impl Busy {
    fn start(w: &Arc<Watch>) -> Busy {
        let mut p = w.phase();
        p.busy += 1;
        p.first_byte = None;
        drop(p);
        w.changed.notify_one();
        Busy(w.clone())
    }
}

impl Drop for Busy {
    fn drop(&mut self) {
        let mut p = self.0.phase();
        p.busy -= 1;
        if p.busy == 0 {
            p.since = Instant::now();
            p.answered = true;
            p.first_byte = None;
        }
        drop(p);
        self.0.changed.notify_one();
    }
}

/// An answer's body that keeps its request `Busy` until hyper has taken all of it (or dropped it).
struct Tracked<B> {
    inner: B,
    _busy: Busy,
}

impl<B: http_body::Body + Unpin> http_body::Body for Tracked<B> {
    type Data = B::Data;
    type Error = B::Error;

    fn poll_frame(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
    ) -> Poll<Option<Result<http_body::Frame<B::Data>, B::Error>>> {
        Pin::new(&mut self.inner).poll_frame(cx)
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> http_body::SizeHint {
        self.inner.size_hint()
    }
}

/// The socket, reporting what it reads and whether its writes are refused to the connection's watchdog.
struct Watched {
    inner: TcpStream,
    watch: Arc<Watch>,
}

impl AsyncRead for Watched {
    fn poll_read(mut self: Pin<&mut Self>, cx: &mut Context<'_>, buf: &mut ReadBuf<'_>) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        let r = Pin::new(&mut self.inner).poll_read(cx, buf);
        if let Poll::Ready(Ok(())) = r {
            self.watch.read(buf.filled().len() - before);
        }
        r
    }
}

impl AsyncWrite for Watched {
    fn poll_write(mut self: Pin<&mut Self>, cx: &mut Context<'_>, buf: &[u8]) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write(cx, buf);
        self.watch.write(r.is_pending());
        r
    }

    fn poll_write_vectored(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write_vectored(cx, bufs);
        self.watch.write(r.is_pending());
        r
    }

    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limits() -> ConnectionLimits {
        ConnectionLimits::from_options(&crate::config::Options::default())
    }

    #[test]
    fn the_connection_cap_is_lowered_to_fit_the_open_files_limit() {
        let mut l = ConnectionLimits { max_connections: 4096, reserved_connections: 32, ..limits() };
        assert_eq!(fit_to_open_files(&mut l, Some(1 << 20), 64), None);
        assert_eq!(l.max_connections, 4096);
        assert_eq!(fit_to_open_files(&mut l, Some(1024), 64), Some(1024));
        assert_eq!(l.max_connections, 1024 - 3 * 32 - 64);
        assert_eq!(fit_to_open_files(&mut l, None, 64), None);
    }

    /// Resolves with the reason, and checks that it took at least `at_least` and not much more.
    async fn expires(w: &Watch, l: &ConnectionLimits, at_least: Duration) -> &'static str {
        let t = Instant::now();
        let why = w.expired(l).await;
        let took = t.elapsed();
        assert!(took >= at_least && took < at_least * 3 + Duration::from_millis(500), "{why} after {took:?}");
        why
    }

    #[tokio::test]
    async fn the_watchdog_applies_the_head_idle_and_send_limits_in_turn() {
        let ms = Duration::from_millis;
        let l = ConnectionLimits {
            header_read_timeout: ms(100),
            keep_alive_timeout: ms(400),
            send_timeout: ms(200),
            ..limits()
        };
        let w = Arc::new(Watch::new());
        // A new connection that says nothing: the header timeout.
        assert_eq!(expires(&w, &l, ms(100)).await, "header-timeout");
        // Served (no head or idle limit meanwhile), then idle: the keep-alive timeout, from the answer.
        let busy = Busy::start(&w);
        assert_eq!(w.deadline(&l), None);
        tokio::time::sleep(ms(500)).await;
        drop(busy);
        assert_eq!(expires(&w, &l, ms(400)).await, "keep-alive-timeout");
        // A later head that has begun to arrive: the header timeout from its first byte.
        w.read(3);
        assert_eq!(expires(&w, &l, ms(100) - ms(5)).await, "header-timeout");
        // An answer the client does not read.
        let _busy = Busy::start(&w);
        w.write(true);
        assert_eq!(expires(&w, &l, ms(200) - ms(5)).await, "send-timeout");
        w.write(false);
        assert_eq!(w.deadline(&l), None);
    }
}
