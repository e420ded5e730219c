//! henrybook: impedance sweeps of inductors in, fitted high-frequency models and a registry out.
//!
//! The numeric core is pure and synchronous (no files, no network, no async runtime); it never imports
//! the outer modules:
//! - [`sweep`]: measurement files (Touchstone, CSV) as text/bytes in, a [`sweep::Sweep`] of frequency,
//!   impedance and per-point standard uncertainty out; S → Z conversion per measurement method; fixture
//!   compensation.
//! - [`model`]: circuit models as pure math: evaluate Z(f) and its analytic Jacobian.
//! - [`fit`]: initial values, the Levenberg–Marquardt solver, model selection, uncertainty and derived
//!   figures, giving a [`fit::FitReport`].
//! - [`export`]: a fitted model as a SPICE subcircuit, Touchstone or CSV text.
//!
//! The service shell around it (async, I/O; the core never imports it):
//! - [`store`]: SQLite through sqlx: parts, lots, sweeps, fits and revisions, the job table, query
//!   figures, tokens, the audit trail.
//! - [`jobs`]: the worker pool that claims jobs with a lease and runs the engine off the runtime.
//! - [`ops`]: the application layer: one function per operation (upload, refit, approve, queries,
//!   exports, ...) and one error type; both transports call it and neither imports the other.
//! - [`http`]: axum routes per resource, bearer-token roles, problem+json errors.
//! - [`grpc`]: the tonic services of `api/henrybook.proto` over the same operations as HTTP, with the
//!   same tokens and roles.
//! - [`registry`]: the pure comparisons the registry stores (verdict against limits, drift against
//!   the baseline, the fixed grid for queries), the typed part numbers and lot codes, and the API's
//!   JSON shapes.
//! - [`report`]: the printable inspection report of a lot's fit, as self-contained HTML and as PDF
//!   (pure: the stored facts in, text and bytes out).
//! - [`serve`]: the listeners' connections: limit, header-read and idle timeouts, drain deadline.
//! - [`app`] builds and runs the whole service; [`settings`] holds its typed settings.
//!
//! The command line lives in [`cli`]; `main.rs` only hands it the arguments.

pub mod app;
pub mod cli;
pub mod export;
pub mod fit;
pub mod grpc;
pub mod http;
pub mod jobs;
pub mod model;
pub mod ops;
pub mod registry;
pub mod report;
pub mod serve;
pub mod server_cli;
pub mod settings;
pub mod store;
pub mod sweep;
pub mod units;
