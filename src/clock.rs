//! Wall-clock time as the stages record it: nanoseconds since the Unix
//! epoch in a `u64`. One function, so every stamp (frame arrival, publish,
//! journal event) is taken the same way.

use std::time::{SystemTime, UNIX_EPOCH};

/// Now, in ns since the Unix epoch (0 if the system clock is before 1970).
pub fn unix_now_ns() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as u64)
}
