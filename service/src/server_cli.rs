//! `henrybook serve`, `henrybook token create`, `henrybook demo`.

use crate::settings::{DatabaseArgs, LogFormat, ServeArgs, Settings};
use crate::store::Store;
use crate::store::tokens::Role;
use clap::{Parser, Subcommand};
use std::process::ExitCode;

#[derive(Debug, Parser)]
#[command(
    name = "henrybook",
    version,
    propagate_version = true,
    about = "The henrybook registry service"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Serve the HTTP API and the gRPC interface, and run fits.
    Serve(ServeArgs),
    /// Manage bearer tokens.
    Token {
        #[command(subcommand)]
        command: TokenCommand,
    },
    /// Start the service on a local demo database, load the demo parts and sweeps through the API,
    /// print the results, and keep serving until Ctrl-C.
    Demo(crate::server_cli::demo::DemoArgs),
    /// Check the record's integrity: the audit trail's hash chain, the results it recorded, and every
    /// stored verdict against its result and the part's limits. Exit status 1 when anything is wrong.
    Verify {
        #[command(flatten)]
        database: DatabaseArgs,
    },
}

#[derive(Debug, Subcommand)]
enum TokenCommand {
    /// List every token: id, role, label, when it was created and revoked (never the token itself,
    /// which is not stored).
    List {
        #[command(flatten)]
        database: DatabaseArgs,
    },
    /// Revoke a token by its id (from `token list`): it stops working at once, also for a running
    /// service, and the audit trail records it.
    Revoke {
        /// The token's id.
        #[arg(long)]
        id: i64,
        #[command(flatten)]
        database: DatabaseArgs,
    },
    /// Create a token and print it once (only its hash is stored).
    Create {
        #[arg(long, value_parser = parse_role)]
        role: Role,
        /// Who the token is for (named in the audit trail).
        #[arg(long)]
        label: Option<String>,
        #[command(flatten)]
        database: DatabaseArgs,
    },
}

fn parse_role(text: &str) -> Result<Role, String> {
    Role::parse(text)
        .ok_or_else(|| format!("role must be reader, inspector or engineer, not {text:?}"))
}

pub mod demo;

/// Installs the tracing subscriber (text or JSON lines; filter from `RUST_LOG`, default info).
pub fn init_tracing(format: LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt().with_env_filter(filter);
    let _ = match format {
        LogFormat::Json => builder.json().try_init(),
        LogFormat::Text => builder.try_init(),
    };
}

/// Caps glibc's malloc arenas at two before any thread starts. By default every thread that allocates
/// under contention may get its own arena (up to eight per core) and keeps what it freed: after 16
/// concurrent 18 MB uploads and their fits the service held 652 MiB, with two arenas 403 MiB
/// (tests/load/big_uploads.sh). `MALLOC_ARENA_MAX` in the environment still wins.
fn limit_malloc_arenas() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    if std::env::var_os("MALLOC_ARENA_MAX").is_none() {
        // SAFETY: mallopt only changes allocator parameters; it is called before other threads exist.
        unsafe {
            libc::mallopt(libc::M_ARENA_MAX, 2);
        }
    }
}

pub fn main(args: Vec<String>) -> ExitCode {
    limit_malloc_arenas();
    let cli = match Cli::try_parse_from(std::iter::once("henrybook".to_string()).chain(args)) {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() {
                ExitCode::from(2)
            } else {
                ExitCode::SUCCESS
            };
        }
    };
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("henrybook: cannot start the async runtime: {e}");
            return ExitCode::FAILURE;
        }
    };
    let result = runtime.block_on(async move {
        match cli.command {
            Command::Serve(args) => {
                init_tracing(args.log_format);
                let settings = Settings::try_from(&args)?;
                crate::app::Application::build(settings)
                    .await?
                    .run_until_stopped()
                    .await
            }
            Command::Token {
                command:
                    TokenCommand::Create {
                        role,
                        label,
                        database,
                    },
            } => {
                let store = Store::open(&database.path).await?;
                let (id, token) = store.create_token(role, label.as_deref()).await?;
                store.close().await;
                eprintln!(
                    "token {id} ({}) created in {}; it is shown only now:",
                    role.as_str(),
                    database.path.display()
                );
                println!("{token}");
                Ok(())
            }
            Command::Token {
                command: TokenCommand::List { database },
            } => {
                let store = Store::open(&database.path).await?;
                let tokens = store.list_tokens().await?;
                store.close().await;
                let when = crate::store::rfc3339;
                println!(
                    "{:<4} {:<10} {:<25} {:<25} label",
                    "id", "role", "created", "revoked"
                );
                for t in tokens {
                    println!(
                        "{:<4} {:<10} {:<25} {:<25} {}",
                        t.token_id,
                        t.role.as_str(),
                        when(t.created_at_ms),
                        t.revoked_at_ms.map_or("-".to_string(), when),
                        t.label
                    );
                }
                Ok(())
            }
            Command::Token {
                command: TokenCommand::Revoke { id, database },
            } => {
                let store = Store::open(&database.path).await?;
                let actor = std::env::var("USER")
                    .map(|u| format!("command line ({u})"))
                    .unwrap_or_else(|_| "command line".into());
                let result = store.revoke_token(&actor, id).await;
                store.close().await;
                let t = result?;
                eprintln!(
                    "token {} ({}, {}) revoked in {}",
                    t.token_id,
                    t.role.as_str(),
                    t.label,
                    database.path.display()
                );
                Ok(())
            }
            Command::Demo(args) => demo::run(args).await,
            Command::Verify { database } => {
                let store = Store::open(&database.path).await?;
                let report = store.verify_integrity().await?;
                store.close().await;
                println!(
                    "{} audit rows, head hash {}; {} stored verdicts checked",
                    report.audit_rows,
                    report.head_hash.as_deref().unwrap_or("none"),
                    report.verdicts_checked
                );
                for p in &report.problems {
                    println!("problem: {p}");
                }
                if report.ok() {
                    println!("the record is intact");
                    Ok(())
                } else {
                    anyhow::bail!("{} problems found", report.problems.len())
                }
            }
        }
    });
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("henrybook: {e:#}");
            ExitCode::FAILURE
        }
    }
}
