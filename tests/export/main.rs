//! Exports: SPICE subcircuits (checked by an independent solver and ngspice), Foster networks,
//! Touchstone and CSV.
//!
//! One test binary per area; each file below is one module (`cargo test --test export <module>::`).
mod fitted;
mod foster;
mod ngspice;
mod properties;
mod spice;
mod touchstone;
