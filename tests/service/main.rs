//! The service from outside: HTTP and gRPC (one answer to one question), jobs, connections, the
//! OpenAPI document and its conformance run, the dashboard in a browser, the command line, the
//! deployment files and the chaos run.
//!
//! One test binary per area; each file below is one module (`cargo test --test service <module>::`).
mod api;
mod chaos;
mod cli;
mod connections;
mod core_corner;
mod dashboard_browser;
mod deploy_files;
mod fallback_and_bands;
mod fixture;
mod grpc;
mod jobs;
mod openapi;
mod pg_replicas;
mod schemathesis;
mod tokens_file;
mod trend_report;
