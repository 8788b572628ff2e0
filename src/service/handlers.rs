//! The RPC handlers of `hypsogrid.v1.HeightService`.
//!
//! Every call goes the same way: authenticate (when tokens are configured), take a request
//! slot, fix the deadline, take ONE store snapshot and keep it for the life of the call (so a
//! cycle swapped in meanwhile never tears an answer), convert the wire request at the edge,
//! run the query on a blocking thread, convert the answer back. One tracing span per call
//! records the method, cycle, latency, response size and status code; the request itself is
//! never logged.

use std::collections::VecDeque;
use std::pin::Pin;
use std::sync::{Arc, RwLock};
use std::time::{Duration, Instant};

use prost::Message;
use tokio::sync::{mpsc, OwnedSemaphorePermit, Semaphore};
use tokio_stream::wrappers::ReceiverStream;
use tonic::metadata::MetadataMap;
use tonic::{Request, Response, Status};
use tracing::field::Empty;
use tracing::{Instrument, Span};

use super::auth::TokenSet;
use super::convert;
use super::status::{self, Rpc};
use crate::model::Vertical;
use crate::pb;
use crate::pb::height_service_server::HeightService;
use crate::products::guidance::GuidanceSettings;
use crate::query::{
    area_rows, area_shape, position, profile, trajectory, AreaQuery, Limits, LoadedCycle,
    PositionQuery, ProfileQuery, TrajectoryQuery,
};
use crate::store::{CycleStore, Snapshot};

/// Settings the handlers work with (a subset of [`super::ServiceConfig`], with the token
/// file already read).
#[derive(Clone, Debug)]
pub struct HandlerSettings {
    /// Point limit of one answer.
    pub limits: Limits,
    /// Largest message the server sends, bytes; area chunks are cut to fit.
    pub max_message_bytes: usize,
    /// Longest a request may run, whatever the client's deadline.
    pub request_timeout: Duration,
    /// Tokens a caller must present, if any.
    pub tokens: Option<TokenSet>,
    /// Calls served at once; further calls are refused with `RESOURCE_EXHAUSTED`.
    pub max_concurrent_requests: usize,
    /// The guidance settings every guidance answer and chart starts from; a request's
    /// thresholds replace the critical thicknesses it names.
    pub guidance: GuidanceInForce,
}

/// The guidance settings in force, shared by every handler and swapped whole when the
/// settings file is re-read: a call uses the settings it started with.
#[derive(Clone, Debug)]
pub struct GuidanceInForce(Arc<RwLock<Arc<GuidanceSettings>>>);

impl GuidanceInForce {
    /// Settings in force from now on.
    pub fn new(settings: GuidanceSettings) -> Self {
        Self(Arc::new(RwLock::new(Arc::new(settings))))
    }

    /// The settings in force now.
    pub fn current(&self) -> Arc<GuidanceSettings> {
        match self.0.read() {
            Ok(s) => Arc::clone(&s),
            // A writer cannot panic while holding the lock (it only stores an Arc); should
            // the lock be poisoned all the same, its value is whole.
            Err(poisoned) => Arc::clone(&poisoned.into_inner()),
        }
    }

    /// Puts `settings` in force for the calls that start from now on.
    pub fn replace(&self, settings: GuidanceSettings) {
        let next = Arc::new(settings);
        match self.0.write() {
            Ok(mut s) => *s = next,
            Err(poisoned) => *poisoned.into_inner() = next,
        }
    }
}

/// The service: a store and the settings. Cheap to clone (shared state is behind `Arc`).
#[derive(Clone, Debug)]
pub struct HeightServiceHandlers {
    store: Arc<CycleStore>,
    settings: Arc<HandlerSettings>,
    slots: Arc<Semaphore>,
}

/// What a call holds for its whole life.
pub(super) struct Call {
    pub(super) snapshot: Arc<Snapshot>,
    /// When the call must have answered.
    deadline: Instant,
    /// The time budget the deadline came from, for the error message.
    budget: Duration,
    /// The request slot, released when the call (or its stream) ends.
    _slot: OwnedSemaphorePermit,
}

/// The stream type of the area RPC.
pub type AreaStream =
    Pin<Box<dyn tokio_stream::Stream<Item = Result<pb::AreaChunk, Status>> + Send>>;

/// Bytes a gRPC message frame adds in front of the message (compression flag and length).
const FRAME_HEADER_BYTES: usize = 5;

impl HeightServiceHandlers {
    /// A service over `store`.
    pub fn new(store: Arc<CycleStore>, settings: HandlerSettings) -> Self {
        let slots = Arc::new(Semaphore::new(settings.max_concurrent_requests.max(1)));
        Self {
            store,
            settings: Arc::new(settings),
            slots,
        }
    }

    /// The store the service answers from.
    pub fn store(&self) -> &Arc<CycleStore> {
        &self.store
    }

    /// The settings the handlers work with.
    pub fn settings(&self) -> &HandlerSettings {
        &self.settings
    }

    /// A unary call whose request is taken whole: admitted ([`Self::begin`]), answered by
    /// `work` with the call and the request's message, and its end recorded on the span
    /// ([`finish`]), refused or not.
    pub(super) async fn answer<Q, A, F, Fut>(
        &self,
        request: Request<Q>,
        work: F,
    ) -> Result<Response<A>, Status>
    where
        A: Message,
        F: FnOnce(Call, Q) -> Fut,
        Fut: std::future::Future<Output = Result<A, Status>>,
    {
        let started = Instant::now();
        let result = async {
            let call = self.begin(request.metadata())?;
            work(call, request.into_inner()).await
        }
        .await;
        finish(started, result)
    }

    /// The common start of every call.
    pub(super) fn begin(&self, metadata: &MetadataMap) -> Result<Call, Status> {
        if let Some(tokens) = &self.settings.tokens {
            tokens.check(metadata)?;
        }
        let slot = Arc::clone(&self.slots)
            .try_acquire_owned()
            .map_err(|_| status::busy(self.settings.max_concurrent_requests))?;
        let budget = time_budget(metadata, self.settings.request_timeout);
        let deadline = Instant::now() + budget;
        if budget.is_zero() {
            return Err(status::deadline_exceeded(budget));
        }
        Ok(Call {
            snapshot: self.store.snapshot(),
            deadline,
            budget,
            _slot: slot,
        })
    }

    #[tracing::instrument(skip_all, fields(method = "GetCatalogue", cycles = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn catalogue_call(
        &self,
        request: Request<pb::CatalogueRequest>,
    ) -> Result<Response<pb::CatalogueResponse>, Status> {
        let started = Instant::now();
        let result = (|| {
            let call = self.begin(request.metadata())?;
            Span::current().record("cycles", call.snapshot.cycles.len());
            Ok::<_, Status>(pb::CatalogueResponse::from(&*call.snapshot))
        })();
        finish(started, result)
    }

    #[tracing::instrument(skip_all, fields(method = "QueryPosition", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn position_call(
        &self,
        request: Request<pb::PositionRequest>,
    ) -> Result<Response<pb::PositionResponse>, Status> {
        self.answer(request, |call, r| async move {
            let r = &r;
            let query = Arc::new(PositionQuery::try_from(r)?);
            let lc = find_cycle(&call.snapshot, &r.cycle_id)?;
            let limits = self.settings.limits;
            let (lc2, q2) = (Arc::clone(&lc), Arc::clone(&query));
            let times = if query.times.is_empty() {
                lc.cycle.lead_times_s.len()
            } else {
                query.times.len()
            };
            let values = query
                .points
                .len()
                .saturating_mul(query.quantities.len())
                .saturating_mul(times);
            let series = small_or_blocking(&call, values, move || position(&lc2, &q2, &limits))
                .await?
                .map_err(|e| status::query_error(e, Rpc::Position))?;
            Ok(convert::position_response(
                &lc.id,
                &query.quantities,
                &series,
            ))
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "QueryProfile", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn profile_call(
        &self,
        request: Request<pb::ProfileRequest>,
    ) -> Result<Response<pb::ProfileResponse>, Status> {
        self.answer(request, |call, r| async move {
            let r = &r;
            let query = ProfileQuery::try_from(r)?;
            let lc = find_cycle(&call.snapshot, &r.cycle_id)?;
            let lc2 = Arc::clone(&lc);
            // One column (four with bilinear sampling): microseconds.
            let answer = small_or_blocking(&call, 1, move || profile(&lc2, &query))
                .await?
                .map_err(|e| status::query_error(e, Rpc::Profile))?;
            Ok(convert::profile_response(&lc.id, &answer))
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "QueryTrajectory", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn trajectory_call(
        &self,
        request: Request<pb::TrajectoryRequest>,
    ) -> Result<Response<pb::TrajectoryResponse>, Status> {
        self.answer(request, |call, r| async move {
            let r = &r;
            let query = Arc::new(TrajectoryQuery::try_from(r)?);
            let lc = find_cycle(&call.snapshot, &r.cycle_id)?;
            let limits = self.settings.limits;
            let (lc2, q2) = (Arc::clone(&lc), Arc::clone(&query));
            let samples = blocking(&call, move || trajectory(&lc2, &q2, &limits))
                .await?
                .map_err(|e| status::query_error(e, Rpc::Trajectory))?;
            Ok(convert::trajectory_response(
                &lc.id,
                &query.quantities,
                &samples,
            ))
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "QueryArea", cycle_id = Empty, rows = Empty, chunks = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn area_call(
        &self,
        request: Request<pb::AreaRequest>,
    ) -> Result<Response<AreaStream>, Status> {
        let started = Instant::now();
        let span = Span::current();
        let prepared = async {
            let call = self.begin(request.metadata())?;
            let r = request.get_ref();
            let query = Arc::new(AreaQuery::try_from(r)?);
            let lc = find_cycle(&call.snapshot, &r.cycle_id)?;
            // Validation walks the selected columns on hybrid levels (a blocking thread);
            // on isobaric levels it takes microseconds.
            let hybrid = matches!(lc.cycle.vertical, Vertical::Hybrid { .. });
            let walk = if hybrid { usize::MAX } else { 0 };
            let (lc2, q2) = (Arc::clone(&lc), Arc::clone(&query));
            let shape = small_or_blocking(&call, walk, move || area_shape(&lc2, &q2))
                .await?
                .map_err(|e| status::query_error(e, Rpc::Area))?;
            let (rows, cols) = (shape.rows, shape.cols);
            check_area_points(rows, cols, query.quantities.len(), &self.settings.limits)?;
            let plan = plan_chunks(
                rows,
                cols,
                query.quantities.len(),
                lc.id.len(),
                self.settings.max_message_bytes,
            )?;
            span.record("rows", rows);
            span.record("chunks", plan.len());
            Ok::<_, Status>((call, query, lc, shape, plan))
        }
        .await;
        let (call, query, lc, shape, plan) = match prepared {
            Ok(p) => p,
            Err(status) => {
                record_end(&span, started, 0, status.code());
                return Err(status);
            }
        };
        let rows = shape.rows;
        let values = rows * shape.cols * query.quantities.len();
        if let ([(0, end)], true) = (
            plan.as_slice(),
            shape.stored && values <= INLINE_AREA_VALUES,
        ) {
            // One chunk of values copied from the stored heights (a chart tool's usual box):
            // answered here, without the hops to a blocking thread and a producer task.
            let (lc2, q2) = (Arc::clone(&lc), Arc::clone(&query));
            let end = *end;
            let answer = small_or_blocking(&call, 0, move || area_rows(&lc2, &q2, 0, end))
                .await
                .and_then(|a| a.map_err(|e| status::query_error(e, Rpc::Area)));
            let chunk = answer.map(|a| convert::area_chunk(&lc.id, a, 0, rows, true));
            if let Ok(chunk) = &chunk {
                if chunk.encoded_len() + FRAME_HEADER_BYTES > self.settings.max_message_bytes {
                    // The size estimate was short (it should not be): the streaming path
                    // splits the rows.
                    return self.stream_area_call(call, query, lc, rows, plan, started, span);
                }
            }
            let bytes = chunk.as_ref().map_or(0, |c| c.encoded_len());
            let code = chunk
                .as_ref()
                .map_or_else(|s| s.code(), |_| tonic::Code::Ok);
            record_end(&span, started, bytes, code);
            let stream: AreaStream = Box::pin(tokio_stream::once(chunk));
            return Ok(Response::new(stream));
        }
        self.stream_area_call(call, query, lc, rows, plan, started, span)
    }

    /// The streaming part of an area call: chunks produced by a task, two in flight.
    #[allow(clippy::too_many_arguments)]
    fn stream_area_call(
        &self,
        call: Call,
        query: Arc<AreaQuery>,
        lc: Arc<LoadedCycle>,
        rows: usize,
        plan: Vec<(usize, usize)>,
        started: Instant,
        span: Span,
    ) -> Result<Response<AreaStream>, Status> {
        // Two chunks in flight: one being sent while the next is computed.
        let (tx, rx) = mpsc::channel(2);
        let max_bytes = self.settings.max_message_bytes;
        let producer = async move {
            let mut sent = 0usize;
            let code = stream_area(&call, &lc, &query, rows, plan, max_bytes, &tx, &mut sent).await;
            record_end(&Span::current(), started, sent, code);
        };
        tokio::spawn(producer.instrument(span));
        let stream: AreaStream = Box::pin(ReceiverStream::new(rx));
        Ok(Response::new(stream))
    }
}

/// Produces the chunks of an area answer into `tx`; returns the final status code.
#[allow(clippy::too_many_arguments)]
async fn stream_area(
    call: &Call,
    lc: &Arc<LoadedCycle>,
    query: &Arc<AreaQuery>,
    total_rows: usize,
    plan: Vec<(usize, usize)>,
    max_bytes: usize,
    tx: &mpsc::Sender<Result<pb::AreaChunk, Status>>,
    sent: &mut usize,
) -> tonic::Code {
    let mut pending: VecDeque<(usize, usize)> = plan.into();
    while let Some((start, end)) = pending.pop_front() {
        let (lc2, q2) = (Arc::clone(lc), Arc::clone(query));
        let answer = match blocking(call, move || area_rows(&lc2, &q2, start, end)).await {
            Ok(Ok(a)) => a,
            Ok(Err(e)) => return send_error(tx, status::query_error(e, Rpc::Area)).await,
            Err(s) => return send_error(tx, s).await,
        };
        let chunk = convert::area_chunk(&lc.id, answer, start, total_rows, start == 0);
        let len = chunk.encoded_len();
        if len + FRAME_HEADER_BYTES > max_bytes {
            if end - start > 1 {
                // The estimate was short (it should not be): split the rows and try again.
                let mid = start + (end - start) / 2;
                pending.push_front((mid, end));
                pending.push_front((start, mid));
                continue;
            }
            return send_error(
                tx,
                status::resource_exhausted(
                    "bbox",
                    &format!(
                        "one row of the area encodes to {len} bytes, more than the server's \
                         maximum message size of {max_bytes} bytes: narrow the box, raise the \
                         stride or ask for fewer quantities"
                    ),
                ),
            )
            .await;
        }
        if tx.send(Ok(chunk)).await.is_err() {
            // The client went away; nothing more to do.
            return tonic::Code::Cancelled;
        }
        *sent += len;
    }
    tonic::Code::Ok
}

async fn send_error(tx: &mpsc::Sender<Result<pb::AreaChunk, Status>>, s: Status) -> tonic::Code {
    let code = s.code();
    // If the client has gone, there is no one to tell.
    let _ = tx.send(Err(s)).await;
    code
}

#[tonic::async_trait]
impl HeightService for HeightServiceHandlers {
    async fn get_catalogue(
        &self,
        request: Request<pb::CatalogueRequest>,
    ) -> Result<Response<pb::CatalogueResponse>, Status> {
        self.catalogue_call(request).await
    }

    type QueryAreaStream = AreaStream;

    async fn query_area(
        &self,
        request: Request<pb::AreaRequest>,
    ) -> Result<Response<Self::QueryAreaStream>, Status> {
        self.area_call(request).await
    }

    async fn query_position(
        &self,
        request: Request<pb::PositionRequest>,
    ) -> Result<Response<pb::PositionResponse>, Status> {
        self.position_call(request).await
    }

    async fn query_profile(
        &self,
        request: Request<pb::ProfileRequest>,
    ) -> Result<Response<pb::ProfileResponse>, Status> {
        self.profile_call(request).await
    }

    async fn query_trajectory(
        &self,
        request: Request<pb::TrajectoryRequest>,
    ) -> Result<Response<pb::TrajectoryResponse>, Status> {
        self.trajectory_call(request).await
    }
}

/// The cycle a request names in the snapshot it holds; empty selects the newest.
pub(super) fn find_cycle(snapshot: &Snapshot, id: &str) -> Result<Arc<LoadedCycle>, Status> {
    match snapshot.find(id) {
        Some(c) => {
            Span::current().record("cycle_id", c.id.as_str());
            Ok(c)
        }
        None => {
            let ids: Vec<&str> = snapshot.cycles.iter().map(|c| c.id.as_str()).collect();
            Err(status::cycle_not_found(id, &ids))
        }
    }
}

/// Most values (points × quantities) of an area copied from the stored heights that are
/// answered on the async worker itself: about 0.12 ms of copying (`benches/query.rs`,
/// 0.075 ms for 200 × 200 at 0.5°), less than the hops to a blocking thread, a producer
/// task and back cost together.
const INLINE_AREA_VALUES: usize = 65_536;

/// Most point-values (points × quantities × times) a position or trajectory call may have to
/// be answered on the async worker itself: such answers take microseconds, less than the hop
/// to a blocking thread and back.
const INLINE_POINT_VALUES: usize = 256;

/// Runs small CPU work on the calling async worker (a panic becomes `INTERNAL`, as on a
/// blocking thread), larger work with [`blocking`].
pub(super) async fn small_or_blocking<R: Send + 'static>(
    call: &Call,
    point_values: usize,
    work: impl FnOnce() -> R + Send + 'static,
) -> Result<R, Status> {
    if point_values > INLINE_POINT_VALUES {
        return blocking(call, work).await;
    }
    if Instant::now() >= call.deadline {
        return Err(status::deadline_exceeded(call.budget));
    }
    std::panic::catch_unwind(std::panic::AssertUnwindSafe(work)).map_err(|_| {
        tracing::error!("query panicked");
        status::internal("the query failed unexpectedly; the server log has details")
    })
}

/// Runs CPU work on a blocking thread, within the call's deadline.
pub(super) async fn blocking<R: Send + 'static>(
    call: &Call,
    work: impl FnOnce() -> R + Send + 'static,
) -> Result<R, Status> {
    if Instant::now() >= call.deadline {
        return Err(status::deadline_exceeded(call.budget));
    }
    let deadline = tokio::time::Instant::from_std(call.deadline);
    match tokio::time::timeout_at(deadline, tokio::task::spawn_blocking(work)).await {
        Ok(Ok(r)) => Ok(r),
        Ok(Err(join)) => {
            tracing::error!(error = %join, "query task failed");
            Err(status::internal(
                "the query failed unexpectedly; the server log has details",
            ))
        }
        Err(_elapsed) => Err(status::deadline_exceeded(call.budget)),
    }
}

/// Records the end of a unary call on its span and logs it.
pub(super) fn finish<T: Message>(
    started: Instant,
    result: Result<T, Status>,
) -> Result<Response<T>, Status> {
    let span = Span::current();
    match result {
        Ok(message) => {
            record_end(&span, started, message.encoded_len(), tonic::Code::Ok);
            Ok(Response::new(message))
        }
        Err(status) => {
            record_end(&span, started, 0, status.code());
            Err(status)
        }
    }
}

fn record_end(span: &Span, started: Instant, bytes: usize, code: tonic::Code) {
    let latency_ms = started.elapsed().as_secs_f64() * 1000.0;
    span.record("latency_ms", latency_ms);
    span.record("response_bytes", bytes);
    span.record("code", tracing::field::debug(code));
    span.in_scope(|| {
        if code == tonic::Code::Ok {
            tracing::info!(latency_ms, response_bytes = bytes, "request done");
        } else {
            tracing::info!(latency_ms, ?code, "request refused");
        }
    });
}

/// The time a call may take: the server's request timeout, or the client's deadline
/// (`grpc-timeout`) if shorter. The client's deadline is shortened by a small margin, so
/// that this service's own DEADLINE_EXCEEDED reaches the client before the transport's
/// timer (which tonic answers with CANCELLED) and before the client gives up.
pub fn time_budget(metadata: &MetadataMap, request_timeout: Duration) -> Duration {
    let client = metadata
        .get("grpc-timeout")
        .and_then(|v| v.to_str().ok())
        .and_then(parse_grpc_timeout);
    match client {
        Some(c) => {
            let margin = (c / 20).clamp(Duration::from_millis(1), Duration::from_millis(50));
            c.saturating_sub(margin).min(request_timeout)
        }
        None => request_timeout,
    }
}

/// Parses a `grpc-timeout` header value: up to 8 ASCII digits and a unit `H`, `M`, `S`,
/// `m`, `u` or `n` (gRPC over HTTP/2 protocol specification, "Timeout").
pub fn parse_grpc_timeout(text: &str) -> Option<Duration> {
    let (digits, unit) = text.split_at(text.len().checked_sub(1)?);
    if digits.is_empty() || digits.len() > 8 || !digits.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    let n: u64 = digits.parse().ok()?;
    Some(match unit {
        "H" => Duration::from_secs(n * 3600),
        "M" => Duration::from_secs(n * 60),
        "S" => Duration::from_secs(n),
        "m" => Duration::from_millis(n),
        "u" => Duration::from_micros(n),
        "n" => Duration::from_nanos(n),
        _ => return None,
    })
}

/// Refuses an area whose point-values exceed the limit, before any is computed.
fn check_area_points(
    rows: usize,
    cols: usize,
    quantities: usize,
    limits: &Limits,
) -> Result<(), Status> {
    let points = rows
        .checked_mul(cols)
        .and_then(|n| n.checked_mul(quantities));
    match points {
        Some(n) if n <= limits.max_points => Ok(()),
        _ => Err(status::resource_exhausted(
            "bbox",
            &format!(
                "the area has {rows} x {cols} points x {quantities} quantities, more than the \
                 server's limit of {} point-values: narrow the box, raise the stride or ask for \
                 fewer quantities",
                limits.max_points
            ),
        )),
    }
}

/// Upper bound of the bytes of a protobuf length prefix (varint) for `n`.
fn varint_len(n: usize) -> usize {
    let mut n = n as u64;
    let mut len = 1;
    while n >= 0x80 {
        n >>= 7;
        len += 1;
    }
    len
}

/// Bytes of a length-delimited field with `payload` bytes: tag, length, payload.
fn delimited(payload: usize) -> usize {
    1 + varint_len(payload) + payload
}

/// An upper bound of the encoded size of an area chunk of `rows` rows.
fn chunk_bytes(rows: usize, cols: usize, quantities: usize, id_len: usize, first: bool) -> usize {
    // The quantity message: a oneof holding at most two doubles.
    let quantity = delimited(delimited(2 * 9));
    let per_quantity = delimited(quantity + delimited(4 * rows * cols) + delimited(rows * cols));
    let header = delimited(id_len) + 11 + delimited(40) + 6 + 6;
    let lats = delimited(8 * rows);
    let lons = if first { delimited(8 * cols) } else { 0 };
    header + lats + lons + quantities * per_quantity
}

/// Cuts `rows` into runs of whole rows whose chunks fit `max_bytes` (frame header included).
fn plan_chunks(
    rows: usize,
    cols: usize,
    quantities: usize,
    id_len: usize,
    max_bytes: usize,
) -> Result<Vec<(usize, usize)>, Status> {
    let fits = |n: usize, first: bool| {
        chunk_bytes(n, cols, quantities, id_len, first) + FRAME_HEADER_BYTES <= max_bytes
    };
    let mut plan = Vec::new();
    let mut start = 0;
    while start < rows {
        let first = start == 0;
        if !fits(1, first) {
            return Err(status::resource_exhausted(
                "bbox",
                &format!(
                    "one row of {cols} columns with {quantities} quantities needs about {} \
                     bytes, more than the server's maximum message size of {max_bytes} bytes: \
                     narrow the box, raise the stride or ask for fewer quantities",
                    chunk_bytes(1, cols, quantities, id_len, first) + FRAME_HEADER_BYTES
                ),
            ));
        }
        // Largest run that fits, by bisection on the monotonic size bound.
        let (mut lo, mut hi) = (1, rows - start);
        while lo < hi {
            let mid = lo + (hi - lo).div_ceil(2);
            if fits(mid, first) {
                lo = mid;
            } else {
                hi = mid - 1;
            }
        }
        plan.push((start, start + lo));
        start += lo;
    }
    Ok(plan)
}

#[cfg(test)]
mod tests {
    use super::*;
    use tonic::metadata::MetadataValue;

    #[test]
    fn grpc_timeout_values_parse_per_the_protocol_units() {
        // Units from the gRPC over HTTP/2 specification (TimeoutUnit).
        assert_eq!(parse_grpc_timeout("2H"), Some(Duration::from_secs(7200)));
        assert_eq!(parse_grpc_timeout("3M"), Some(Duration::from_secs(180)));
        assert_eq!(parse_grpc_timeout("30S"), Some(Duration::from_secs(30)));
        assert_eq!(parse_grpc_timeout("250m"), Some(Duration::from_millis(250)));
        assert_eq!(parse_grpc_timeout("7u"), Some(Duration::from_micros(7)));
        assert_eq!(parse_grpc_timeout("99n"), Some(Duration::from_nanos(99)));
        for bad in ["", "S", "123456789S", "12x", "-1S", "1.5S"] {
            assert_eq!(parse_grpc_timeout(bad), None, "{bad}");
        }
    }

    #[test]
    fn the_budget_is_the_shorter_of_client_and_server() {
        let server = Duration::from_secs(30);
        let mut m = MetadataMap::new();
        assert_eq!(time_budget(&m, server), server);
        m.insert("grpc-timeout", MetadataValue::from_static("2S"));
        let b = time_budget(&m, server);
        assert!(
            b < Duration::from_secs(2) && b >= Duration::from_millis(1950),
            "{b:?}"
        );
        m.insert("grpc-timeout", MetadataValue::from_static("5M"));
        assert_eq!(time_budget(&m, server), server);
        m.insert("grpc-timeout", MetadataValue::from_static("1m"));
        assert_eq!(time_budget(&m, server), Duration::ZERO);
    }

    #[test]
    fn chunk_plans_cover_every_row_once_and_fit() {
        for (rows, cols, nq, max) in [
            (49, 81, 1, 4 << 20),
            (49, 81, 3, 8_000),
            (1000, 7, 2, 600),
            (1, 1, 1, 300),
        ] {
            let plan = plan_chunks(rows, cols, nq, 20, max).unwrap();
            let mut next = 0;
            for &(a, b) in &plan {
                assert_eq!(a, next);
                assert!(b > a);
                assert!(chunk_bytes(b - a, cols, nq, 20, a == 0) + FRAME_HEADER_BYTES <= max);
                next = b;
            }
            assert_eq!(next, rows);
        }
        assert_eq!(plan_chunks(49, 81, 1, 20, 4 << 20).unwrap().len(), 1);
        let err = plan_chunks(10, 10_000, 4, 20, 1000).unwrap_err();
        assert_eq!(err.code(), tonic::Code::ResourceExhausted);
        assert!(err.message().starts_with("bbox: "));
    }

    #[test]
    fn the_size_bound_holds_for_a_real_chunk() {
        // Encode a chunk with worst-case varints and compare with the bound.
        let rows = 3;
        let cols = 17;
        let chunk = pb::AreaChunk {
            cycle_id: "x".repeat(20),
            lead_time_s: i64::MIN,
            valid_time: "2031-01-14T06:00:00Z".into(),
            row_offset: u32::MAX,
            total_rows: u32::MAX,
            latitudes_deg: vec![1.0; rows],
            longitudes_deg: vec![1.0; cols],
            fields: vec![
                pb::QuantityValues {
                    quantity: Some(pb::Quantity::from(&crate::query::Quantity::Thickness(
                        crate::model::Layer {
                            bottom_pa: 1e5,
                            top_pa: 5e4,
                        }
                    ))),
                    values: vec![1.0; rows * cols],
                    flags: vec![3; rows * cols],
                };
                2
            ],
        };
        assert!(chunk.encoded_len() <= chunk_bytes(rows, cols, 2, 20, true));
    }

    #[test]
    fn the_point_limit_is_checked_without_overflow() {
        let limits = Limits { max_points: 1000 };
        assert!(check_area_points(10, 10, 10, &limits).is_ok());
        assert_eq!(
            check_area_points(10, 10, 11, &limits).unwrap_err().code(),
            tonic::Code::ResourceExhausted
        );
        assert!(check_area_points(usize::MAX, 3, 2, &limits).is_err());
    }
}
