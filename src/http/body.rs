//! Request bodies: the size limit, the memory budget for bodies in flight, and the lingering
//! read of a refused body.
//!
//! - **Size.** A declared `Content-Length` over `server.max_body_bytes` is refused from the
//!   headers; a chunked body is refused as soon as it passes the limit.
//! - **Budget.** [`BodyBudget`] holds `server.max_inflight_body_bytes` across all requests. A
//!   body reserves its declared length before a byte of it is read (a chunked body, or a stream
//!   line, reserves as it arrives), and keeps the reservation until its answer is built, so the
//!   decoded slate it turns into is counted while it exists. A request that would pass the
//!   budget is answered 503 `overloaded` at once: many slow clients each holding a large body
//!   cannot grow the process past the budget.
//! - **Lingering read.** hyper closes a connection whose request body was not read to its end.
//!   A client that writes its whole body before reading (Python's `http.client`, `requests`,
//!   curl without `Expect: 100-continue`) then meets a reset instead of our answer. So a refused
//!   body is read and discarded to its end before answering, bounded in time by
//!   `body_timeout_ms` and in bytes by [`LINGER_FACTOR`] × `max_body_bytes` (none of it kept), as
//!   production HTTP servers do on a lingering close. Past either bound, or when the client waits
//!   for `100 Continue` (it will not send the body after a final answer), the answer goes out
//!   with `Connection: close`.

use std::sync::Arc;
use std::time::Duration;

use axum::body::{Body, Bytes};
use axum::http::{header, HeaderMap, HeaderValue};
use axum::response::{IntoResponse, Response};
use futures_util::StreamExt;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};

use super::ApiError;

/// The budget's unit: reservations are counted in KiB, so a 64-bit semaphore covers any budget
/// and a reservation of up to 4 TiB fits the semaphore's `u32` acquisition count.
const UNIT: usize = 1024;

/// A chunked body or stream line reserves ahead in steps of this many bytes, so a body that
/// arrives in small frames does not touch the semaphore per frame.
const GROWTH_STEP: usize = 64 << 10;

/// A refused body is read and discarded up to this many times `max_body_bytes` (counting what
/// was already read); a larger one is not worth the bandwidth and gets `Connection: close`.
pub const LINGER_FACTOR: u64 = 4;

/// The memory budget for request bodies in flight (`server.max_inflight_body_bytes`).
#[derive(Debug, Clone)]
pub struct BodyBudget {
    /// A semaphore because reservations are taken by many tasks at once and released by drop,
    /// including from the pool threads that decode large bodies; `try_acquire` never waits, so
    /// a full budget answers at once instead of queueing memory.
    permits: Arc<Semaphore>,
    bytes: usize,
}

impl BodyBudget {
    /// A budget of `bytes` (rounded up to whole KiB).
    #[must_use]
    pub fn new(bytes: usize) -> Self {
        let units = bytes.div_ceil(UNIT).min(Semaphore::MAX_PERMITS);
        Self { permits: Arc::new(Semaphore::new(units)), bytes }
    }

    /// The configured budget in bytes.
    #[must_use]
    pub fn bytes(&self) -> usize {
        self.bytes
    }

    /// Bytes reserved right now (rounded to KiB).
    #[must_use]
    pub fn reserved(&self) -> usize {
        (self.bytes.div_ceil(UNIT).min(Semaphore::MAX_PERMITS) - self.permits.available_permits()) * UNIT
    }

    /// An empty reservation that can grow.
    #[must_use]
    pub fn empty(&self) -> Reservation {
        Reservation { permits: self.permits.clone(), held: None }
    }
}

/// Bytes reserved from a [`BodyBudget`]; released when dropped.
#[derive(Debug)]
pub struct Reservation {
    permits: Arc<Semaphore>,
    held: Option<OwnedSemaphorePermit>,
}

impl Reservation {
    /// Grows the reservation to cover `bytes`; false (and unchanged) when the budget cannot.
    pub fn grow_to(&mut self, bytes: usize) -> bool {
        let need = bytes.div_ceil(UNIT);
        let have = self.held.as_ref().map_or(0, OwnedSemaphorePermit::num_permits);
        if need <= have {
            return true;
        }
        let Ok(more) = u32::try_from(need - have) else { return false };
        match self.permits.clone().try_acquire_many_owned(more) {
            Ok(p) => {
                match &mut self.held {
                    Some(held) => held.merge(p),
                    None => self.held = Some(p),
                }
                true
            }
            Err(_) => false,
        }
    }

    /// Grows ahead in steps of 64 KiB to cover `bytes` (at most `cap`).
    pub fn grow_ahead(&mut self, bytes: usize, cap: usize) -> bool {
        self.grow_to(bytes.next_multiple_of(GROWTH_STEP).min(cap).max(bytes))
    }

    /// Moves everything reserved into a new reservation, leaving this one empty.
    #[must_use]
    pub fn take(&mut self) -> Self {
        Self { permits: self.permits.clone(), held: self.held.take() }
    }
}

/// A body that was not accepted, with whether its connection can serve another request.
#[derive(Debug)]
pub struct Refusal {
    /// Why.
    pub error: ApiError,
    /// False when the body was not read to its end: the answer says `Connection: close`.
    pub reusable: bool,
}

impl IntoResponse for Refusal {
    fn into_response(self) -> Response {
        let mut response = self.error.into_response();
        if !self.reusable {
            response.headers_mut().insert(header::CONNECTION, HeaderValue::from_static("close"));
        }
        response
    }
}

/// Limits for reading one body.
#[derive(Debug, Clone, Copy)]
pub struct BodyLimits {
    /// `server.max_body_bytes`.
    pub max: usize,
    /// `server.body_timeout_ms`: for the whole body, and again for a lingering read.
    pub timeout: Duration,
}

/// The declared `Content-Length`, if any.
#[must_use]
pub fn declared_length(headers: &HeaderMap) -> Option<u64> {
    headers.get(header::CONTENT_LENGTH).and_then(|v| v.to_str().ok()).and_then(|v| v.parse::<u64>().ok())
}

/// Whether the client waits for `100 Continue` before it sends the body.
fn expects_continue(headers: &HeaderMap) -> bool {
    headers
        .get(header::EXPECT)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.trim().eq_ignore_ascii_case("100-continue"))
}

/// Reads a whole body under the size limit and the budget.
///
/// # Errors
/// A [`Refusal`]: 413 `body_too_large`, 503 `overloaded` (budget), 408 `body_timeout` or 400
/// `body_read_failed`; a refused body has been read to its end where the bounds allowed.
pub async fn receive(
    budget: &BodyBudget,
    headers: &HeaderMap,
    body: Body,
    limits: BodyLimits,
) -> Result<(Bytes, Reservation), Refusal> {
    let declared = declared_length(headers);
    let mut reservation = budget.empty();
    let refuse_now = if declared.is_some_and(|n| n > limits.max as u64) {
        Some(ApiError::PayloadTooLarge { limit: limits.max })
    } else if declared.is_some_and(|n| !reservation.grow_to(n as usize)) {
        Some(ApiError::BodyBudget { budget: budget.bytes() })
    } else {
        None
    };
    if let Some(error) = refuse_now {
        let reusable = linger(headers, body.into_data_stream(), 0, limits).await;
        return Err(Refusal { error, reusable });
    }
    let mut frames = body.into_data_stream();
    let mut buf = Vec::with_capacity(declared.map_or(0, |n| n as usize));
    let read = async {
        while let Some(frame) = frames.next().await {
            let chunk = frame.map_err(|e| (ApiError::BodyRead(e.to_string()), false))?;
            let len = buf.len() + chunk.len();
            if len > limits.max {
                return Err((ApiError::PayloadTooLarge { limit: limits.max }, true));
            }
            if declared.is_none() && !reservation.grow_ahead(len, limits.max) {
                return Err((ApiError::BodyBudget { budget: budget.bytes() }, true));
            }
            buf.extend_from_slice(&chunk);
        }
        Ok(())
    };
    match tokio::time::timeout(limits.timeout, read).await {
        Ok(Ok(())) => Ok((Bytes::from(buf), reservation)),
        // A read error or a stall leaves nothing to linger on.
        Err(_) => {
            Err(Refusal { error: ApiError::BodyTimeout { ms: limits.timeout.as_millis() }, reusable: false })
        }
        Ok(Err((error, false))) => Err(Refusal { error, reusable: false }),
        Ok(Err((error, true))) => {
            let already = buf.len() as u64;
            drop(buf);
            drop(reservation);
            let reusable = linger(headers, frames, already, limits).await;
            Err(Refusal { error, reusable })
        }
    }
}

/// Reads and discards the rest of a refused body, bounded by `limits.timeout` and by
/// [`LINGER_FACTOR`] × `limits.max` bytes in all (counting `already` read); true when it was
/// read to its end, so the connection can serve the next request.
pub async fn linger(
    headers: &HeaderMap,
    mut frames: axum::body::BodyDataStream,
    already: u64,
    limits: BodyLimits,
) -> bool {
    let cap = LINGER_FACTOR.saturating_mul(limits.max as u64);
    if expects_continue(headers) || declared_length(headers).is_some_and(|n| n > cap) {
        return false;
    }
    let drain = async {
        let mut seen = already;
        while let Some(frame) = frames.next().await {
            let Ok(chunk) = frame else { return false };
            seen += chunk.len() as u64;
            if seen > cap {
                return false;
            }
        }
        true
    };
    matches!(tokio::time::timeout(limits.timeout, drain).await, Ok(true))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reservations_grow_release_and_refuse_past_the_budget() {
        let budget = BodyBudget::new(10 * UNIT);
        let mut a = budget.empty();
        assert!(a.grow_to(4 * UNIT));
        assert!(a.grow_to(3 * UNIT), "shrinking is a no-op");
        assert_eq!(budget.reserved(), 4 * UNIT);
        let mut b = budget.empty();
        assert!(!b.grow_to(7 * UNIT), "4 + 7 KiB exceed 10 KiB");
        assert_eq!(budget.reserved(), 4 * UNIT, "a refused growth reserves nothing");
        assert!(b.grow_to(6 * UNIT));
        let moved = b.take();
        assert_eq!(budget.reserved(), 10 * UNIT);
        drop(moved);
        drop(a);
        assert_eq!(budget.reserved(), 0);
        // Round up: one byte costs one KiB.
        assert!(b.grow_to(1));
        assert_eq!(budget.reserved(), UNIT);
        let mut c = budget.empty();
        assert!(c.grow_ahead(10, 2 * UNIT), "ahead, but not past the cap");
        assert_eq!(budget.reserved(), 3 * UNIT);
    }
}
