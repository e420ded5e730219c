//! Readers: Touchstone and CSV files against the Touchstone specification's examples, scikit-rf's
//! conversions, junk input, the real measured sweeps and the demo data.
//!
//! One test binary per area; each file below is one module (`cargo test --test sweep <module>::`).
mod demo_data;
mod junk;
mod real;
mod skrf;
mod touchstone_spec;
