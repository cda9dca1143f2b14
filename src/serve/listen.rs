//! The HTTP listener under everything served on `serve.bind`: its own accept loop on hyper's
//! HTTP/1 connections (axum's `serve` has no header-read timeout), so that slow or idle
//! clients cannot hold the server. A connection must send a whole request head within
//! `header_read_timeout` of opening or of its previous answer, else it is closed: that one
//! timer bounds slow headers and idle keep-alive connections alike. At most
//! `max_connections` are open; when one more arrives, the oldest connection that is not
//! being answered (idle, or still sending its head) is closed to make room, and if every
//! open connection is being answered, the new one waits in the listen backlog until one
//! ends. Shutdown stops accepting and lets answers in progress finish (within a grace).

use std::collections::BTreeMap;
use std::convert::Infallible;
use std::future::Future;
use std::pin::Pin;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;

use axum::Router;
use axum::response::Response;
use hyper::body::Incoming;
use hyper::server::conn::http1;
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::service::TowerToHyperService;
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{OwnedSemaphorePermit, Semaphore};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

/// Default time a connection has to send a request head: a person's browser or a script
/// sends it in milliseconds, so ten seconds only closes connections that stall (or sit idle
/// after an answer); hyper's own default is thirty.
pub const DEFAULT_HEADER_READ_TIMEOUT: Duration = Duration::from_secs(10);

/// Default number of open connections: far more than the analysts, dashboards and scrapers
/// of one health department keep open, few enough that their buffers (hyper's are at most
/// about 400 KiB each) stay small beside the store's work.
pub const DEFAULT_MAX_CONNECTIONS: usize = 256;

/// How long a connection asked to close (to make room, or at shutdown) may take to finish
/// the answer it is writing before it is dropped: longer than the default SQL time limit,
/// so an answer in progress normally completes.
const CLOSE_GRACE: Duration = Duration::from_secs(10);

/// Pause after an accept error that is not about one connection (such as running out of
/// file descriptors), so the loop does not spin while the cause lasts.
const ACCEPT_ERROR_PAUSE: Duration = Duration::from_secs(1);

/// How often a full listener looks again for a connection it may close to make room.
const ROOM_RECHECK: Duration = Duration::from_millis(100);

/// The limits of the listener.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct HttpLimits {
    /// Time to send a whole request head after opening or after the previous answer.
    pub header_read_timeout: Duration,
    /// Connections open at once.
    pub max_connections: usize,
}

impl Default for HttpLimits {
    fn default() -> HttpLimits {
        HttpLimits {
            header_read_timeout: DEFAULT_HEADER_READ_TIMEOUT,
            max_connections: DEFAULT_MAX_CONNECTIONS,
        }
    }
}

/// Accepts connections on `listener` and answers them with `router` until `shutdown`.
pub async fn run(
    listener: TcpListener,
    router: Router,
    shutdown: CancellationToken,
    limits: HttpLimits,
) -> std::io::Result<()> {
    let open = Arc::new(OpenConnections::new(limits.max_connections));
    let tracker = TaskTracker::new();
    while let Some(stream) = next_connection(&listener, &shutdown).await {
        let Some(slot) = open.admit(&shutdown).await else { break };
        tracker.spawn(serve_connection(stream, router.clone(), slot, limits, shutdown.clone()));
    }
    tracker.close();
    tracker.wait().await;
    Ok(())
}

/// The next accepted connection, or `None` at shutdown.
async fn next_connection(listener: &TcpListener, shutdown: &CancellationToken) -> Option<TcpStream> {
    loop {
        let accepted = tokio::select! {
            () = shutdown.cancelled() => return None,
            accepted = listener.accept() => accepted,
        };
        match accepted {
            Ok((stream, _peer)) => return Some(stream),
            Err(err) if is_connection_error(&err) => {}
            Err(err) => {
                tracing::warn!(error = %err, "accepting a connection failed; pausing");
                tokio::select! {
                    () = shutdown.cancelled() => return None,
                    () = tokio::time::sleep(ACCEPT_ERROR_PAUSE) => {}
                }
            }
        }
    }
}

/// Errors about the one connection being accepted (it went away): nothing to wait for.
fn is_connection_error(err: &std::io::Error) -> bool {
    use std::io::ErrorKind::{ConnectionAborted, ConnectionRefused, ConnectionReset};
    matches!(err.kind(), ConnectionRefused | ConnectionAborted | ConnectionReset)
}

/// Answers one connection until it ends, is asked to close, or the server shuts down.
async fn serve_connection(
    stream: TcpStream,
    router: Router,
    slot: Slot,
    limits: HttpLimits,
    shutdown: CancellationToken,
) {
    let service = Answering { inner: TowerToHyperService::new(router), state: slot.state.clone() };
    let mut builder = http1::Builder::new();
    builder.timer(TokioTimer::new()).header_read_timeout(limits.header_read_timeout);
    let connection = builder.serve_connection(TokioIo::new(stream), service);
    let mut connection = std::pin::pin!(connection);
    tokio::select! {
        // Ended: answered and closed, client gone, or the head took too long. Nothing of it
        // is worth a log line (a client's mistakes are not the server's).
        _ = connection.as_mut() => return,
        () = slot.state.close.cancelled() => {}
        () = shutdown.cancelled() => {}
    }
    // A connection that never completed a request head has no answer to finish, and hyper's
    // graceful shutdown would wait for the rest of a half-sent head: drop it now.
    if slot.state.requests.load(Ordering::SeqCst) == 0 {
        return;
    }
    connection.as_mut().graceful_shutdown();
    let _ = tokio::time::timeout(CLOSE_GRACE, connection).await;
}

/// The router as hyper calls it, counting the requests being answered on the connection.
struct Answering {
    inner: TowerToHyperService<Router>,
    state: Arc<ConnectionState>,
}

type Answer = Pin<Box<dyn Future<Output = Result<Response, Infallible>> + Send>>;

impl hyper::service::Service<hyper::Request<Incoming>> for Answering {
    type Response = Response;
    type Error = Infallible;
    type Future = Answer;

    fn call(&self, request: hyper::Request<Incoming>) -> Answer {
        let busy = Busy::new(self.state.clone());
        let answer = self.inner.call(request);
        Box::pin(async move {
            let response = answer.await;
            drop(busy);
            response
        })
    }
}

/// What the listener knows of one open connection.
#[derive(Debug, Default)]
struct ConnectionState {
    /// Requests being answered now; 0 means waiting for a request head (or idle).
    answering: AtomicUsize,
    /// Requests begun on the connection so far.
    requests: AtomicU64,
    /// Cancelled to ask the connection to close.
    close: CancellationToken,
}

/// Counts one request as being answered while it lives.
struct Busy(Arc<ConnectionState>);

impl Busy {
    fn new(state: Arc<ConnectionState>) -> Busy {
        state.requests.fetch_add(1, Ordering::SeqCst);
        state.answering.fetch_add(1, Ordering::SeqCst);
        Busy(state)
    }
}

impl Drop for Busy {
    fn drop(&mut self) {
        self.0.answering.fetch_sub(1, Ordering::SeqCst);
    }
}

/// The open connections, oldest first, and the room for more.
#[derive(Debug)]
struct OpenConnections {
    room: Arc<Semaphore>,
    open: Mutex<BTreeMap<u64, Arc<ConnectionState>>>,
    next_id: AtomicU64,
}

impl OpenConnections {
    fn new(max: usize) -> OpenConnections {
        OpenConnections {
            room: Arc::new(Semaphore::new(max.max(1))),
            open: Mutex::new(BTreeMap::new()),
            next_id: AtomicU64::new(0),
        }
    }

    fn lock(&self) -> MutexGuard<'_, BTreeMap<u64, Arc<ConnectionState>>> {
        // A poisoned lock only means a connection task panicked while holding it; the map
        // is still valid.
        self.open.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Room for one more connection, closing waiting ones as needed; `None` at shutdown.
    async fn admit(self: &Arc<Self>, shutdown: &CancellationToken) -> Option<Slot> {
        let permit = loop {
            if let Ok(permit) = self.room.clone().try_acquire_owned() {
                break permit;
            }
            self.close_oldest_waiting();
            tokio::select! {
                () = shutdown.cancelled() => return None,
                permit = self.room.clone().acquire_owned() => break permit.ok()?,
                () = tokio::time::sleep(ROOM_RECHECK) => {}
            }
        };
        let id = self.next_id.fetch_add(1, Ordering::SeqCst);
        let state = Arc::new(ConnectionState::default());
        self.lock().insert(id, state.clone());
        Some(Slot { id, state, open: self.clone(), _permit: permit })
    }

    /// Asks the oldest connection that is not being answered, and not already closing, to
    /// close.
    fn close_oldest_waiting(&self) {
        let open = self.lock();
        let waiting =
            open.values().find(|c| c.answering.load(Ordering::SeqCst) == 0 && !c.close.is_cancelled());
        if let Some(connection) = waiting {
            connection.close.cancel();
        }
    }
}

/// One connection's place among the open ones; given back when dropped.
struct Slot {
    id: u64,
    state: Arc<ConnectionState>,
    open: Arc<OpenConnections>,
    _permit: OwnedSemaphorePermit,
}

impl Drop for Slot {
    fn drop(&mut self) {
        self.open.lock().remove(&self.id);
    }
}
