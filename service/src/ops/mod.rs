//! The application layer: one function per operation, called by both transports (HTTP in
//! [`crate::http`], gRPC in [`crate::grpc`]) after they have extracted their input, and one error
//! type, [`OpsError`], which each transport maps to its own wire form. A rule about what an operation
//! accepts, what it stores and what it wakes lives here, never in a handler; the transports only
//! convert, check the caller's role and answer. Nothing here imports either transport.
//!
//! - [`sweeps`]: upload a sweep (fixture rules, limits, options, reading the file, duplicate keys, the
//!   store call, waking the workers) and a stored sweep's file.
//! - [`fits`]: list, status, detail, counts, curves; cancel, retry, refit, approve, reject.
//! - [`exports`]: a fit's model as JSON, SPICE or Touchstone text; download names.
//! - [`parts`]: part queries, create, read, limits, the trend across lots.
//! - [`report`]: the printable inspection report (HTML, PDF).
//! - [`auth`]: a bearer token's caller checked against a role.
//! - [`backpressure`]: the bounds on queued fits and uploads in flight.

pub mod auth;
pub mod backpressure;
pub mod error;
pub mod exports;
pub mod fits;
pub mod parts;
pub mod report;
pub mod sweeps;

pub use error::{ErrorKind, OpsError, OpsResult};
