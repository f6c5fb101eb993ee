//! The dashboard endpoint (axum): `/metrics` (OpenMetrics text), `/health` (JSON) and
//! `/events` (the event feed as JSON lines, streamed with chunked transfer encoding, one object
//! per line). Loopback by default.
//!
//! The feed response stays open until the reader goes away or the gateway stops; a stopping
//! gateway ends every feed response so that the server's graceful shutdown can complete.

use super::feed::{EventFeed, GatewayEvent};
use super::metrics::{GatewayMetrics, MetricSources, OPENMETRICS_CONTENT_TYPE};
use axum::body::{Body, Bytes};
use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Instant;
use tokio::sync::broadcast::error::RecvError;
use tokio_util::sync::CancellationToken;

/// What the handlers share.
#[derive(Debug)]
pub struct HttpState {
    /// The metrics.
    pub metrics: Arc<GatewayMetrics>,
    /// Where gateway-wide figures come from.
    pub sources: MetricSources,
    /// The event feed.
    pub feed: EventFeed,
    /// Site name.
    pub site: String,
    /// Start of the daemon.
    pub started: Instant,
    /// True once the shutdown drain has begun.
    pub draining: Arc<AtomicBool>,
    /// Ends every feed response.
    pub stop: CancellationToken,
}

/// The router of the endpoint.
pub fn router(state: Arc<HttpState>) -> Router {
    Router::new()
        .route("/metrics", get(metrics))
        .route("/health", get(health))
        .route("/events", get(events))
        .with_state(state)
}

async fn metrics(State(s): State<Arc<HttpState>>) -> Response {
    s.metrics.refresh(&s.sources);
    let text = s.metrics.encode();
    ([(header::CONTENT_TYPE, OPENMETRICS_CONTENT_TYPE)], text).into_response()
}

async fn health(State(s): State<Arc<HttpState>>) -> Response {
    let draining = s.draining.load(Ordering::Relaxed);
    let ingest = s.sources.ingest.snapshot();
    let body = serde_json::json!({
        "status": if draining { "draining" } else { "running" },
        "site": s.site,
        "version": crate::VERSION,
        "uptime_s": s.started.elapsed().as_secs_f64(),
        "connections": ingest.connections_active,
        // "failing" while a write error keeps the record from being written (see /metrics
        // csgate_record_*); the gateway keeps ingesting and retries.
        "record": if s.sources.record.failing.load(Ordering::Relaxed) { "failing" } else { "writing" },
        "streams": s.sources.pipeline.streams.load(Ordering::Relaxed),
    });
    // A draining gateway answers 503 so that a load balancer or supervisor stops sending.
    let code = if draining {
        StatusCode::SERVICE_UNAVAILABLE
    } else {
        StatusCode::OK
    };
    (
        code,
        [(header::CONTENT_TYPE, "application/json")],
        body.to_string(),
    )
        .into_response()
}

async fn events(State(s): State<Arc<HttpState>>) -> Response {
    let rx = s.feed.subscribe();
    let open = serde_json::to_string(&GatewayEvent::FeedOpen {
        site: s.site.clone(),
        version: crate::VERSION.to_string(),
    })
    .unwrap_or_default();
    let stop = s.stop.clone();
    let first = Some(open);
    let stream =
        futures::stream::unfold((rx, stop, first), |(mut rx, stop, mut first)| async move {
            if let Some(line) = first.take() {
                return Some((
                    Ok::<Bytes, std::convert::Infallible>(line_bytes(&line)),
                    (rx, stop, None),
                ));
            }
            let got = tokio::select! {
                _ = stop.cancelled() => return None,
                r = rx.recv() => r,
            };
            let line = match got {
                Ok(line) => line_bytes(&line),
                Err(RecvError::Lagged(missed)) => line_bytes(
                    &serde_json::to_string(&GatewayEvent::FeedLag { missed }).unwrap_or_default(),
                ),
                Err(RecvError::Closed) => return None,
            };
            Some((Ok(line), (rx, stop, None)))
        });
    (
        [
            (header::CONTENT_TYPE, "application/x-ndjson"),
            (header::CACHE_CONTROL, "no-cache"),
        ],
        Body::from_stream(stream),
    )
        .into_response()
}

fn line_bytes(line: &str) -> Bytes {
    let mut v = Vec::with_capacity(line.len() + 1);
    v.extend_from_slice(line.as_bytes());
    v.push(b'\n');
    Bytes::from(v)
}
