//! What ends a rational fit's stages early: the caller's cancel flag and the fit's deadline.

use crate::fit::FitControl;
use std::sync::atomic::Ordering;
use std::time::Instant;

pub(super) fn cancelled(control: &FitControl) -> bool {
    control
        .cancel
        .as_ref()
        .is_some_and(|c| c.load(Ordering::Relaxed))
}

/// What ends a rational fit early, checked inside every stage's loop (relocation, refinement,
/// passivity enforcement): the caller's cancel flag and the fit's deadline.
#[derive(Clone, Copy)]
pub(crate) struct Stop<'a> {
    pub control: &'a FitControl,
    pub deadline: Option<Instant>,
}

impl Stop<'_> {
    /// A stop that never fires.
    #[cfg(test)]
    pub(crate) const NEVER: Stop<'static> = Stop {
        control: &NO_CONTROL,
        deadline: None,
    };

    pub(crate) fn cancelled(&self) -> bool {
        cancelled(self.control)
    }

    pub(crate) fn expired(&self) -> bool {
        self.deadline.is_some_and(|d| Instant::now() > d)
    }

    /// Cancelled or past the deadline: the current stage ends with what it has.
    pub(crate) fn now(&self) -> bool {
        self.cancelled() || self.expired()
    }
}

#[cfg(test)]
static NO_CONTROL: FitControl = FitControl {
    cancel: None,
    progress: None,
};
