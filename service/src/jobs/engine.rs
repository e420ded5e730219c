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

/// How an upload's open/short fixture sweeps are applied to its DUT sweep (stored with the sweep).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FixtureTopology {
    /// The instrument's usual open/short compensation ([`crate::sweep::fixture::Topology::Approximate`]).
    Approximate,
    /// The exact L-shaped fixture, series part on the instrument side.
    SeriesThenShunt,
    /// The exact L-shaped fixture, shunt part on the instrument side.
    ShuntThenSeries,
    /// Matrix open/short de-embedding of three 2-port files before the method's S → Z formula.
    TwoPort,
}

impl FixtureTopology {
    pub const ALL: [FixtureTopology; 4] = [
        FixtureTopology::Approximate,
        FixtureTopology::SeriesThenShunt,
        FixtureTopology::ShuntThenSeries,
        FixtureTopology::TwoPort,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            FixtureTopology::Approximate => "approximate",
            FixtureTopology::SeriesThenShunt => "series-then-shunt",
            FixtureTopology::ShuntThenSeries => "shunt-then-series",
            FixtureTopology::TwoPort => "two-port",
        }
    }

    pub fn parse(text: &str) -> Option<FixtureTopology> {
        FixtureTopology::ALL
            .into_iter()
            .find(|t| t.as_str() == text.trim())
    }
}

/// One uploaded file as the engine reads it.
#[derive(Debug, Clone, Copy)]
pub struct InputFile<'a> {
    pub name: &'a str,
    pub bytes: &'a [u8],
}

/// Open and short fixture sweeps measured on the DUT's frequency grid.
#[derive(Debug, Clone, Copy)]
pub struct FixtureFiles<'a> {
    pub open: InputFile<'a>,
    pub short: InputFile<'a>,
    pub topology: FixtureTopology,
}

/// A file of an upload that cannot be used: which file, and the reader's error (with its line).
#[derive(Debug, Clone, PartialEq)]
pub struct InputError {
    pub file_name: String,
    pub error: SweepError,
}

impl std::fmt::Display for InputError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}: {}", self.file_name, self.error)
    }
}

/// The DUT impedance an upload implies: its file read by the method, and compensated by its fixture
/// sweeps when it has them. Upload validation and the worker both call this, so a file is refused at
/// upload exactly when its fit could not read it.
pub fn read_input(
    engine: &dyn Engine,
    file: InputFile<'_>,
    fixture: Option<FixtureFiles<'_>>,
    read: &ReadOptions,
) -> Result<Sweep, InputError> {
    use crate::sweep::fixture::{self, Topology};
    let blame = |f: InputFile<'_>| {
        let name = f.name.to_string();
        move |error: SweepError| InputError {
            file_name: name.clone(),
            error,
        }
    };
    let Some(fx) = fixture else {
        return engine
            .read_sweep(file.name, file.bytes, read)
            .map_err(blame(file));
    };
    let topology = match fx.topology {
        FixtureTopology::Approximate => Topology::Approximate,
        FixtureTopology::SeriesThenShunt => Topology::SeriesThenShunt,
        FixtureTopology::ShuntThenSeries => Topology::ShuntThenSeries,
        FixtureTopology::TwoPort => {
            let dut = crate::sweep::read_network(file.name, file.bytes).map_err(blame(file))?;
            let open =
                crate::sweep::read_network(fx.open.name, fx.open.bytes).map_err(blame(fx.open))?;
            let short = crate::sweep::read_network(fx.short.name, fx.short.bytes)
                .map_err(blame(fx.short))?;
            let clean =
                fixture::deembed_open_short_two_port(&dut, &open, &short).map_err(blame(file))?;
            return crate::sweep::sweep_from_network(&clean, read).map_err(blame(file));
        }
    };
    let dut = engine
        .read_sweep(file.name, file.bytes, read)
        .map_err(blame(file))?;
    let open = engine
        .read_sweep(fx.open.name, fx.open.bytes, read)
        .map_err(blame(fx.open))?;
    let short = engine
        .read_sweep(fx.short.name, fx.short.bytes, read)
        .map_err(blame(fx.short))?;
    fixture::compensate(topology, &dut, &open, &short).map_err(blame(file))
}
