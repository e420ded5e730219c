//! The numeric core's fits: the lumped model against scipy, handbook values and invented populations,
//! the real measured sweeps, the core laws, and the rational family against scikit-rf.
//!
//! One test binary per area; each file below is one module (`cargo test --test fit <module>::`).
mod construction_reference;
mod core_law_recovery;
mod demo_data;
mod material_sigma;
mod population;
mod property;
mod rational;
mod rational_demo;
mod rational_population;
mod rational_skrf;
mod real_sweeps;
mod recovery;
mod scipy_reference;
mod thomson;
