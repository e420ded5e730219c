//! Sweeps read at upload, handed to the worker in this process that fits them, so a new upload's
//! files are read once, not a second time by the worker.
//!
//! An upload reads its files through the engine's reader before it stores them (that is how a bad file
//! is refused with its line). The worker that later fits the queued job would read the stored files
//! again with the same method, Z0 and fixture, and get the same sweep. So the upload leaves the sweep
//! here under its fit id, and the worker takes it from here when it is present and reads the stored
//! files when it is not: after a restart, on another replica, for a refit or a retried attempt, or when
//! the hand-off was full.
//!
//! The hand-off is bounded by the points it holds ([`HELD_POINTS`], about 16 MiB of sweeps). When it
//! is full, a new sweep is not added (the oldest are the jobs the workers claim next), and entries
//! older than [`HELD_FOR`] are dropped first: a job that another replica claimed is never taken here.
//! A worker may claim a job between the upload's commit and its hand-off; the hand-off remembers the
//! last [`MISSES_KEPT`] fits a worker asked for in vain and does not hold a sweep left for one.

use crate::sweep::Sweep;
use std::collections::VecDeque;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Most points held at once: 512 Ki points of 32 bytes (frequency, complex impedance, σ), 16 MiB.
pub const HELD_POINTS: usize = 512 * 1024;

/// How long an entry waits for its worker before it may be dropped to make room.
pub const HELD_FOR: Duration = Duration::from_secs(600);

/// Fits asked for in vain that the hand-off remembers.
pub const MISSES_KEPT: usize = 256;

#[derive(Default)]
pub struct HandOff {
    held: Mutex<Held>,
}

#[derive(Default)]
struct Held {
    /// (fit id, when it was left, the sweep), oldest first.
    entries: VecDeque<(i64, Instant, Sweep)>,
    points: usize,
    /// Fits whose worker asked before their sweep was left, newest last.
    missed: VecDeque<i64>,
}

impl HandOff {
    /// Leaves the sweep read for the fit `fit_id`; returns whether it is held (false: no room).
    pub fn leave(&self, fit_id: i64, sweep: Sweep) -> bool {
        self.leave_at(fit_id, sweep, Instant::now())
    }

    fn leave_at(&self, fit_id: i64, sweep: Sweep, now: Instant) -> bool {
        let points = sweep.frequency_hz.len();
        let mut held = self.held.lock().expect("hand-off");
        if let Some(i) = held.missed.iter().position(|id| *id == fit_id) {
            // Its worker already read the stored files.
            held.missed.remove(i);
            return false;
        }
        if held.points + points > HELD_POINTS {
            while let Some((_, at, _)) = held.entries.front()
                && now.saturating_duration_since(*at) >= HELD_FOR
            {
                let (_, _, old) = held.entries.pop_front().expect("front exists");
                held.points -= old.frequency_hz.len();
            }
        }
        if held.points + points > HELD_POINTS {
            return false;
        }
        held.points += points;
        held.entries.push_back((fit_id, now, sweep));
        true
    }

    /// Takes the sweep left for the fit `fit_id`, if any.
    pub fn take(&self, fit_id: i64) -> Option<Sweep> {
        let mut held = self.held.lock().expect("hand-off");
        let Some(i) = held.entries.iter().position(|(id, _, _)| *id == fit_id) else {
            if held.missed.len() == MISSES_KEPT {
                held.missed.pop_front();
            }
            held.missed.push_back(fit_id);
            return None;
        };
        let (_, _, sweep) = held.entries.remove(i).expect("position is in range");
        held.points -= sweep.frequency_hz.len();
        Some(sweep)
    }

    /// Sweeps held now.
    pub fn len(&self) -> usize {
        self.held.lock().expect("hand-off").entries.len()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sweep::Method;
    use num_complex::Complex64;

    fn sweep(points: usize) -> Sweep {
        Sweep {
            frequency_hz: (1..=points).map(|i| i as f64 * 1e3).collect(),
            impedance_ohm: vec![Complex64::new(1.0, 1.0); points],
            sigma_ohm: vec![0.01; points],
            method: Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn a_sweep_is_taken_once_by_its_own_fit() {
        let h = HandOff::default();
        assert!(h.leave(7, sweep(30)));
        assert!(h.leave(8, sweep(40)));
        assert!(h.take(9).is_none());
        assert_eq!(h.take(8).map(|s| s.frequency_hz.len()), Some(40));
        assert!(h.take(8).is_none(), "taken once");
        assert_eq!(h.take(7).map(|s| s.frequency_hz.len()), Some(30));
        assert!(h.is_empty());
    }

    #[test]
    fn a_sweep_left_after_its_worker_asked_is_not_held() {
        let h = HandOff::default();
        assert!(h.take(5).is_none());
        assert!(!h.leave(5, sweep(30)), "its worker read the files already");
        assert!(h.is_empty());
        // Remembered once: a later fit with the same id (a new database) is held again.
        assert!(h.leave(5, sweep(30)));
        // Only the last MISSES_KEPT misses are remembered.
        for id in 100..100 + MISSES_KEPT as i64 + 1 {
            assert!(h.take(id).is_none());
        }
        assert!(h.leave(100, sweep(10)), "forgotten");
        assert!(!h.leave(101, sweep(10)), "remembered");
    }

    #[test]
    fn a_full_hand_off_keeps_what_it_holds_and_drops_only_what_waited_too_long() {
        let h = HandOff::default();
        let t0 = Instant::now();
        assert!(h.leave_at(1, sweep(HELD_POINTS / 2), t0));
        assert!(h.leave_at(2, sweep(HELD_POINTS / 2), t0 + Duration::from_secs(1)));
        // Full: a newer sweep is not added, and the older ones stay for their workers.
        assert!(!h.leave_at(3, sweep(10), t0 + Duration::from_secs(2)));
        assert_eq!(h.len(), 2);
        // Once the first has waited HELD_FOR, it makes room; the second has not waited that long.
        assert!(h.leave_at(3, sweep(10), t0 + HELD_FOR));
        assert!(h.take(1).is_none());
        assert!(h.take(2).is_some());
        assert!(h.take(3).is_some());
        assert!(h.is_empty());
        // Taking gives the points back.
        assert!(h.leave_at(4, sweep(HELD_POINTS), t0 + HELD_FOR));
    }
}
