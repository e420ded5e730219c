//! The registry's pure logic: what the service stores and compares, with no I/O.
//!
//! - [`ids`]: the names a part and a lot go by ([`ids::PartNumber`], [`ids::LotCode`]), each parsed
//!   once by its one constructor where it enters the service.
//! - [`limits`]: a part's acceptance limits and their validation.
//! - [`grid`]: the fixed log-frequency grid on which |Z| and effective L of every fitted model are
//!   stored, so behavioural queries read stored figures instead of refitting.
//! - [`verdict`]: a fit report against a part's limits (pass/fail per limit, measured value, margin).
//! - [`drift`]: a fit report against the approved baseline (per parameter, in percent and in σ).
//! - [`figures`]: the figures copied from a report into indexed columns.
//! - [`assessment`]: all of the above for one succeeded fit, computed before the store writes it.
//! - [`trend`]: a part's figures across its lots, with Shewhart control limits and run flags.
//! - [`wire`]: the JSON shapes of the HTTP API (api/openapi.yaml), shared by the store and the routes.
//!
//! Everything numeric here is a comparison of figures the engine produced, or an evaluation of the
//! engine's own fitted model ([`crate::model::ImpedanceModel`]); nothing is estimated here.

pub mod assessment;
pub mod drift;
pub mod figures;
pub mod grid;
pub mod ids;
pub mod limits;
pub mod trend;
pub mod verdict;
pub mod wire;
