//! The store on PostgreSQL against a real server at 127.0.0.1:5432: the schema and the job queue
//! (`queue`), and every other operation held to the SQLite store (`parity`). Each file is one module
//! of this binary (`cargo test --test store <module>::`).

mod parity;
mod queue;
mod transient;
