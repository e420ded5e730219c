//! `henrybook demo` (filled in below).

#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Folder for the demo database (created when missing).
    #[arg(long, default_value = ".henrybook-demo")]
    pub folder: std::path::PathBuf,
}

pub async fn run(_args: DemoArgs) -> anyhow::Result<()> {
    anyhow::bail!("the demo is not built yet")
}
