//! A log line that a flood could repeat without end (an accept error, a refused peer),
//! written at most once per interval together with how many were held back meanwhile.
//!
//! Invariants: the first event always passes; afterwards at most one event per interval
//! passes; every event held back is counted exactly once, in the next one that passes.
//! Time is tokio's clock, so tests run it paused.

use std::sync::Mutex;
use std::time::Duration;

use tokio::time::Instant;

/// Admits one event per interval and counts the others.
#[derive(Debug)]
pub struct Throttle {
    interval: Duration,
    state: Mutex<State>,
}

#[derive(Debug, Default)]
struct State {
    last: Option<Instant>,
    held_back: u64,
}

impl Throttle {
    /// A throttle passing one event per `interval`.
    pub fn new(interval: Duration) -> Throttle {
        Throttle {
            interval,
            state: Mutex::new(State::default()),
        }
    }

    /// `Some(n)` when this event may be logged now, `n` being the events held back since
    /// the last one that passed; `None` when it is held back.
    pub fn admit(&self, now: Instant) -> Option<u64> {
        let mut state = match self.state.lock() {
            Ok(guard) => guard,
            Err(poisoned) => poisoned.into_inner(),
        };
        let due = state
            .last
            .is_none_or(|last| now.saturating_duration_since(last) >= self.interval);
        if due {
            state.last = Some(now);
            Some(std::mem::take(&mut state.held_back))
        } else {
            state.held_back += 1;
            None
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test(start_paused = true)]
    async fn one_event_per_interval_and_the_rest_counted() {
        let throttle = Throttle::new(Duration::from_secs(1));
        let mut passed = Vec::new();
        let mut held = 0;
        // 250 events over 12.5 s.
        for _ in 0..250 {
            match throttle.admit(Instant::now()) {
                Some(n) => passed.push(n),
                None => held += 1,
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        assert_eq!(passed.first(), Some(&0), "the first event passes");
        assert!(passed.len() <= 13, "{} lines in 12.5 s", passed.len());
        assert_eq!(
            passed.iter().sum::<u64>() + throttle_pending(&throttle),
            held
        );
        assert!(passed.iter().skip(1).all(|n| *n == 19), "{passed:?}");
    }

    fn throttle_pending(t: &Throttle) -> u64 {
        t.state.lock().map(|s| s.held_back).unwrap_or(0)
    }
}
