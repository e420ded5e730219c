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
//! The command line lives in [`cli`]; `main.rs` only hands it the arguments.

pub mod cli;
pub mod export;
pub mod fit;
pub mod http;
pub mod model;
pub mod server_cli;
pub mod sweep;
