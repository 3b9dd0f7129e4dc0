//! Flow control of ExplainStream: each stream has room for a fixed number
//! of requests in flight (read, and not yet handed to the transport), and
//! the server reads the next request only when it holds a place. A place
//! is given back when the answer leaves for the transport, whose own
//! buffers are bounded by HTTP/2 flow control, so a client that reads
//! slowly slows the server's reading instead of growing its memory.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};

use tokio::sync::{OwnedSemaphorePermit, Semaphore};

use crate::telemetry;

/// What every stream of one server has done; read by the metrics and by
/// tests that check the bound without timing anything.
#[derive(Debug, Default)]
pub struct StreamStats {
    /// Requests the server has read from its streams.
    read: AtomicU64,
    /// Answers handed to the transport.
    sent: AtomicU64,
    /// The most requests one stream has had in flight at once.
    peak_in_flight: AtomicUsize,
}

impl StreamStats {
    pub fn requests_read(&self) -> u64 {
        self.read.load(Ordering::SeqCst)
    }

    pub fn answers_sent(&self) -> u64 {
        self.sent.load(Ordering::SeqCst)
    }

    pub fn peak_in_flight(&self) -> usize {
        self.peak_in_flight.load(Ordering::SeqCst)
    }
}

/// One stream's room: `bound` places, and how many are taken.
#[derive(Debug, Clone)]
pub(super) struct Room {
    places: Arc<Semaphore>,
    taken: Arc<AtomicUsize>,
    stats: Arc<StreamStats>,
}

impl Room {
    pub(super) fn new(bound: usize, stats: Arc<StreamStats>) -> Room {
        Room {
            places: Arc::new(Semaphore::new(bound.max(1))),
            taken: Arc::new(AtomicUsize::new(0)),
            stats,
        }
    }

    /// Waits for a free place; taken before the next request is read.
    pub(super) async fn place(&self) -> Option<Place> {
        let permit = self.places.clone().acquire_owned().await.ok()?;
        Some(Place {
            _permit: permit,
            room: self.clone(),
            entered: false,
        })
    }
}

/// A place in a stream's room, held from just before a request is read
/// until its answer is handed to the transport (or dropped).
#[derive(Debug)]
pub(super) struct Place {
    _permit: OwnedSemaphorePermit,
    room: Room,
    /// Whether a request was read into this place (a place given back
    /// unused, when the stream ends, counts nothing).
    entered: bool,
}

impl Place {
    /// Counts the request just read into this place.
    pub(super) fn enter(&mut self) {
        self.entered = true;
        let stats = &self.room.stats;
        stats.read.fetch_add(1, Ordering::SeqCst);
        let now = self.room.taken.fetch_add(1, Ordering::SeqCst) + 1;
        stats.peak_in_flight.fetch_max(now, Ordering::SeqCst);
        metrics::gauge!(telemetry::STREAM_IN_FLIGHT).increment(1.0);
    }

    /// The answer leaves for the transport: the place is given back.
    pub(super) fn sent(self) {
        self.room.stats.sent.fetch_add(1, Ordering::SeqCst);
    }
}

impl Drop for Place {
    fn drop(&mut self) {
        if self.entered {
            self.room.taken.fetch_sub(1, Ordering::SeqCst);
            metrics::gauge!(telemetry::STREAM_IN_FLIGHT).decrement(1.0);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn a_full_room_gives_no_place_until_one_is_given_back() {
        // Bounded queues with back-pressure (common practice, no source).
        let stats = Arc::new(StreamStats::default());
        let room = Room::new(2, stats.clone());
        let mut first = room.place().await.unwrap();
        first.enter();
        let mut second = room.place().await.unwrap();
        second.enter();
        assert!(room.places.clone().try_acquire_owned().is_err());
        first.sent();
        let mut third = room.place().await.unwrap();
        third.enter();
        assert_eq!(stats.requests_read(), 3);
        assert_eq!(stats.answers_sent(), 1);
        assert_eq!(stats.peak_in_flight(), 2);
    }
}
