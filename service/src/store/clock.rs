//! The time source of the log: the system clock in service, a hand-moved clock in tests (maturity and retention
//! are tested at exact instants, without sleeping).

use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Arc;

/// Milliseconds since the Unix epoch.
#[derive(Clone)]
pub struct Clock(Arc<dyn Fn() -> i64 + Send + Sync>);

impl std::fmt::Debug for Clock {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Clock({})", self.now_ms())
    }
}

impl Clock {
    /// The system clock.
    pub fn system() -> Clock {
        Clock(Arc::new(system_now_ms))
    }

    /// A clock that reads `time`, which the caller moves.
    pub fn manual(time: Arc<AtomicI64>) -> Clock {
        Clock(Arc::new(move || time.load(Ordering::SeqCst)))
    }

    /// The time now, in ms since the epoch.
    pub fn now_ms(&self) -> i64 {
        (self.0)()
    }
}

/// The system time in ms since the epoch (0 if the clock is before 1970).
pub fn system_now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
        .unwrap_or(0)
}
