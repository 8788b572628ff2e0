//! The heights of a served cycle, held one (member, time) step at a time, so that a cycle can
//! be served as soon as its file has been read while the heights of its last steps are still
//! being computed.
//!
//! A step's heights are set once and never change. Until they are set, a query either rebuilds
//! the columns it needs (the same integration the batch runs, see
//! [`crate::compute::StepColumns`]) or waits for them ([`ServedHeights::wait`]); which one is
//! the caller's choice, by the number of columns it needs.

use std::sync::{Condvar, Mutex, OnceLock};

use ndarray::{s, Array3, Array5};

/// The heights of one (member, time) step.
#[derive(Clone, Debug, PartialEq)]
pub struct StepHeights {
    /// Geopotential height on every level, geopotential metres, `[level, lat, lon]`
    /// (bottom-up; full levels for hybrid coordinates); `NaN` where masked.
    pub geopotential_height: Array3<f32>,
    /// 1 where the level lies below the ground (its height is then an extrapolation), else 0.
    pub below_ground: Array3<u8>,
}

/// Why the heights of a step will never be set.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("the heights of member {member}, time step {time} could not be computed: {reason}")]
pub struct HeightsUnavailable {
    /// Member index.
    pub member: usize,
    /// Time step index.
    pub time: usize,
    /// What stopped the computation.
    pub reason: String,
}

/// The heights of every step of one cycle, each set once, in any order.
#[derive(Debug)]
pub struct ServedHeights {
    times: usize,
    steps: Vec<OnceLock<Result<StepHeights, String>>>,
    method: String,
    /// Guards the steps asked for while pending, oldest first (step indices); wakes those
    /// waiting for a step whenever one is set.
    set_lock: Mutex<Vec<usize>>,
    set_signal: Condvar,
}

impl ServedHeights {
    /// No step computed yet, for a cycle of `members` × `times` steps; `method` describes
    /// how the heights are computed (for answers and output attributes).
    pub fn pending(members: usize, times: usize, method: String) -> Self {
        Self {
            times,
            steps: (0..members * times).map(|_| OnceLock::new()).collect(),
            method,
            set_lock: Mutex::new(Vec::new()),
            set_signal: Condvar::new(),
        }
    }

    /// The method sentence.
    pub fn method(&self) -> &str {
        &self.method
    }

    /// Number of (member, time) steps.
    pub fn steps(&self) -> usize {
        self.steps.len()
    }

    fn cell(&self, member: usize, time: usize) -> Option<&OnceLock<Result<StepHeights, String>>> {
        if time >= self.times {
            return None;
        }
        self.steps.get(member * self.times + time)
    }

    /// The heights of a step when they have been computed; `None` while they are pending,
    /// when they failed, or for an index out of range.
    pub fn ready(&self, member: usize, time: usize) -> Option<&StepHeights> {
        self.cell(member, time)?.get()?.as_ref().ok()
    }

    /// The heights of a step, waiting for them while they are computed.
    ///
    /// # Errors
    /// When their computation failed or stopped, or for an index out of range.
    pub fn wait(&self, member: usize, time: usize) -> Result<&StepHeights, HeightsUnavailable> {
        let unavailable = |reason: String| HeightsUnavailable {
            member,
            time,
            reason,
        };
        let cell = self
            .cell(member, time)
            .ok_or_else(|| unavailable("no such step".into()))?;
        if let Some(result) = cell.get() {
            return result.as_ref().map_err(|e| unavailable(e.clone()));
        }
        // Checked under the lock, which every setter takes after setting: a step set before
        // the check is seen, one set after it wakes the wait.
        let mut held = self.lock();
        // Asked for: computed before the steps nobody waits for (see `next_pending`).
        let index = member * self.times + time;
        if cell.get().is_none() && !held.contains(&index) {
            held.push(index);
        }
        loop {
            if let Some(result) = cell.get() {
                return result.as_ref().map_err(|e| unavailable(e.clone()));
            }
            held = self
                .set_signal
                .wait(held)
                .unwrap_or_else(std::sync::PoisonError::into_inner);
        }
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Vec<usize>> {
        self.set_lock
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// Wakes every waiter (after a step was set).
    fn signal(&self) {
        drop(self.lock());
        self.set_signal.notify_all();
    }

    /// Number of steps whose heights are in.
    pub fn ready_steps(&self) -> usize {
        self.steps
            .iter()
            .filter(|c| matches!(c.get(), Some(Ok(_))))
            .count()
    }

    /// Number of steps whose heights will never be in: their computation failed or stopped.
    pub fn failed_steps(&self) -> usize {
        self.steps
            .iter()
            .filter(|c| matches!(c.get(), Some(Err(_))))
            .count()
    }

    /// The step to compute next: the one asked for longest ago ([`ServedHeights::wait`])
    /// that is still pending, else the first pending in file order; `None` when none is.
    /// A query that waits for the last step of a many-step cycle whose steps are computed
    /// after the read (hybrid levels) is then answered after one step's
    /// computation rather than all of them.
    pub fn next_pending(&self) -> Option<(usize, usize)> {
        let times = self.times.max(1);
        let pending = |i: &usize| self.steps.get(*i).is_some_and(|c| c.get().is_none());
        let asked = {
            let mut held = self.lock();
            held.retain(pending);
            held.first().copied()
        };
        asked
            .or_else(|| (0..self.steps.len()).find(pending))
            .map(|i| (i / times, i % times))
    }

    /// The (member, time) steps still pending, in file order.
    pub fn pending_steps(&self) -> Vec<(usize, usize)> {
        let times = self.times.max(1);
        (0..self.steps.len())
            .filter(|&i| self.steps[i].get().is_none())
            .map(|i| (i / times, i % times))
            .collect()
    }

    /// Sets the heights of a step; a step already set (or out of range) keeps what it has.
    pub fn set(&self, member: usize, time: usize, heights: StepHeights) {
        if let Some(cell) = self.cell(member, time) {
            let _ = cell.set(Ok(heights));
            self.signal();
        }
    }

    /// Marks every step still pending as failed for `reason`, so that nobody waits for it.
    pub fn fail_pending(&self, reason: &str) {
        for cell in &self.steps {
            let _ = cell.set(Err(reason.to_string()));
        }
        self.signal();
    }

    /// The heights of every step as one batch array pair `[member, time, level, lat, lon]`,
    /// waiting for steps still pending.
    ///
    /// # Errors
    /// The first step whose heights are unavailable.
    pub fn to_arrays(&self) -> Result<(Array5<f32>, Array5<u8>), HeightsUnavailable> {
        let members = self.steps.len() / self.times.max(1);
        let first = self.wait(0, 0)?;
        let (levels, rows, cols) = first.geopotential_height.dim();
        let dim = (members, self.times, levels, rows, cols);
        let mut z = Array5::<f32>::zeros(dim);
        let mut b = Array5::<u8>::zeros(dim);
        for m in 0..members {
            for t in 0..self.times {
                let step = self.wait(m, t)?;
                z.slice_mut(s![m, t, .., .., ..])
                    .assign(&step.geopotential_height);
                b.slice_mut(s![m, t, .., .., ..]).assign(&step.below_ground);
            }
        }
        Ok((z, b))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn step(v: f32) -> StepHeights {
        StepHeights {
            geopotential_height: Array3::from_elem((2, 1, 3), v),
            below_ground: Array3::zeros((2, 1, 3)),
        }
    }

    #[test]
    fn steps_are_set_once_in_any_order_and_waiting_returns_them() {
        let h = ServedHeights::pending(2, 3, "test".into());
        assert_eq!(h.pending_steps().len(), 6);
        h.set(1, 2, step(12.0));
        h.set(1, 2, step(99.0));
        assert_eq!(h.ready(1, 2), Some(&step(12.0)));
        assert_eq!(h.ready(0, 0), None);
        assert_eq!(h.pending_steps()[0], (0, 0));
        assert!(!h.pending_steps().contains(&(1, 2)));
        std::thread::scope(|scope| {
            let waiter = scope.spawn(|| h.wait(0, 1).cloned());
            h.set(0, 1, step(1.0));
            assert_eq!(waiter.join().unwrap(), Ok(step(1.0)));
        });
        assert!(!h.pending_steps().is_empty());
        assert_eq!(h.ready_steps(), 2);
        h.fail_pending("stopped");
        assert_eq!(h.ready_steps(), 2);
        assert!(h.pending_steps().is_empty());
        assert_eq!(
            h.ready(1, 2),
            Some(&step(12.0)),
            "a set step keeps its heights"
        );
        let err = h.wait(0, 0).unwrap_err();
        assert_eq!(
            (err.member, err.time, err.reason.as_str()),
            (0, 0, "stopped")
        );
        assert!(h.wait(0, 3).is_err(), "time out of range");
        assert!(h.wait(2, 0).is_err(), "member out of range");
    }

    /// A step a query waits for is computed before the steps nobody has asked for, the
    /// longest asked first; set or failed steps leave the queue.
    #[test]
    fn steps_asked_for_come_next() {
        let h = ServedHeights::pending(2, 3, "test".into());
        assert_eq!(h.next_pending(), Some((0, 0)));
        let asked = |h: &ServedHeights| h.lock().clone();
        std::thread::scope(|scope| {
            let last = scope.spawn(|| h.wait(1, 2).cloned());
            while asked(&h) != [5] {
                assert!(!last.is_finished());
                std::thread::yield_now();
            }
            let second = scope.spawn(|| h.wait(0, 1).cloned());
            while asked(&h) != [5, 1] {
                assert!(!second.is_finished());
                std::thread::yield_now();
            }
            assert_eq!(h.next_pending(), Some((1, 2)));
            h.set(1, 2, step(12.0));
            assert_eq!(last.join().unwrap(), Ok(step(12.0)));
            assert_eq!(h.next_pending(), Some((0, 1)));
            h.set(0, 1, step(1.0));
            assert_eq!(second.join().unwrap(), Ok(step(1.0)));
        });
        assert_eq!(h.next_pending(), Some((0, 0)));
        assert!(asked(&h).is_empty());
        // Waiting for a step already set asks nothing.
        assert_eq!(h.wait(1, 2).cloned(), Ok(step(12.0)));
        assert!(asked(&h).is_empty());
        h.fail_pending("stopped");
        assert_eq!(h.next_pending(), None);
    }

    #[test]
    fn batch_heights_round_trip_through_steps() {
        let mut z = Array5::<f32>::zeros((2, 2, 3, 2, 2));
        z.iter_mut().enumerate().for_each(|(i, v)| *v = i as f32);
        let mut b = Array5::<u8>::zeros(z.dim());
        b[[1, 0, 2, 1, 1]] = 1;
        let served = ServedHeights::pending(2, 2, "m".into());
        for m in 0..2 {
            for t in 0..2 {
                let step = StepHeights {
                    geopotential_height: z.slice(s![m, t, .., .., ..]).to_owned(),
                    below_ground: b.slice(s![m, t, .., .., ..]).to_owned(),
                };
                served.set(m, t, step);
            }
        }
        assert!(served.pending_steps().is_empty());
        assert_eq!(served.method(), "m");
        assert_eq!(served.ready(1, 0).unwrap().below_ground[[2, 1, 1]], 1);
        assert_eq!(served.to_arrays().unwrap(), (z, b));
    }
}
