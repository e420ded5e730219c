//! Generates the gRPC messages and services from `api/henrybook.proto` with protox (pure Rust, so no
//! `protoc` is needed) and tonic-prost-build. Also tells cargo to rebuild the crate when a migration
//! is added or changed: `sqlx::migrate!` embeds `migrations/sqlite/` (and `migrations/postgres/`) at
//! compile time; cargo watches the whole `migrations/` tree.

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let crate_dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let api = crate_dir.join("../api");
    let proto = api.join("henrybook.proto");
    println!("cargo:rerun-if-changed={}", proto.display());
    println!(
        "cargo:rerun-if-changed={}",
        crate_dir.join("../migrations").display()
    );
    let descriptors = protox::compile([&proto], [&api])?;
    tonic_prost_build::configure().compile_fds(descriptors)?;
    Ok(())
}
