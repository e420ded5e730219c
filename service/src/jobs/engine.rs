//! The seam between the service and the numeric core. The service only ever calls the engine through
//! this trait; [`CoreEngine`] is the real one. Tests of the job machinery wrap it (e.g. to make a fit
//! take long enough to be interrupted) without changing what it computes.

use crate::fit::{FitControl, FitError, FitOptions, FitReport};
use crate::sweep::{ReadOptions, Sweep, SweepError};

pub trait Engine: Send + Sync + 'static {
    fn read_sweep(
        &self,
        file_name: &str,
        bytes: &[u8],
        options: &ReadOptions,
    ) -> Result<Sweep, SweepError>;

    fn fit(
        &self,
        sweep: &Sweep,
        options: &FitOptions,
        control: &FitControl,
    ) -> Result<FitReport, FitError>;
}

/// The numeric core: [`crate::sweep::read_sweep`] and [`crate::fit::fit`].
#[derive(Debug, Clone, Copy, Default)]
pub struct CoreEngine;

impl Engine for CoreEngine {
    fn read_sweep(
        &self,
        file_name: &str,
        bytes: &[u8],
        options: &ReadOptions,
    ) -> Result<Sweep, SweepError> {
        crate::sweep::read_sweep(file_name, bytes, options)
    }

    fn fit(
        &self,
        sweep: &Sweep,
        options: &FitOptions,
        control: &FitControl,
    ) -> Result<FitReport, FitError> {
        crate::fit::fit(sweep, options, control)
    }
}
