use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand, ValueEnum};
use tracing_subscriber::EnvFilter;

/// bandwatch: rolling spectra, band levels and alarms for live DAQ channels.
#[derive(Debug, Parser)]
#[command(version, about)]
struct Cli {
    /// Log format on stderr.
    #[arg(long, value_enum, default_value_t = LogFormat::Text, global = true)]
    log_format: LogFormat,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
enum LogFormat {
    Text,
    Json,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Run the daemon.
    Run {
        /// Config file (TOML).
        #[arg(long)]
        config: PathBuf,
        /// Listen address for HTTP, overriding `server.listen`.
        #[arg(long)]
        listen: Option<SocketAddr>,
    },
    /// Validate a config file and print every problem found.
    Check {
        #[arg(long)]
        config: PathBuf,
    },
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    init_tracing(cli.log_format);
    match cli.command {
        Command::Check { config } => match bandwatch::config::load(&config) {
            Ok(c) => {
                println!(
                    "{}: ok ({} source(s), {} channel(s), {} band(s))",
                    config.display(),
                    c.sources.len(),
                    c.channels.len(),
                    c.channels.iter().map(|c| c.bands.len()).sum::<usize>()
                );
                ExitCode::SUCCESS
            }
            Err(e) => {
                eprintln!("{e}");
                ExitCode::from(2)
            }
        },
        Command::Run { config, listen } => {
            let mut cfg = match bandwatch::config::load(&config) {
                Ok(c) => c,
                Err(e) => {
                    eprintln!("{e}");
                    return ExitCode::from(2);
                }
            };
            if let Some(l) = listen {
                cfg.listen = l;
            }
            let rt = match tokio::runtime::Builder::new_multi_thread()
                .worker_threads(2)
                .enable_all()
                .thread_name("bandwatch-io")
                .build()
            {
                Ok(rt) => rt,
                Err(e) => {
                    eprintln!("cannot start the async runtime: {e}");
                    return ExitCode::FAILURE;
                }
            };
            rt.block_on(run(cfg))
        }
    }
}

async fn run(cfg: bandwatch::config::Config) -> ExitCode {
    let listener = match tokio::net::TcpListener::bind(cfg.listen).await {
        Ok(l) => l,
        Err(e) => {
            tracing::error!(listen = %cfg.listen, error = %e, "cannot bind the HTTP listener");
            return ExitCode::FAILURE;
        }
    };
    let addr = listener.local_addr().map_or(cfg.listen, |a| a);
    tracing::info!(%addr, channels = cfg.channels.len(), "bandwatch listening on http://{addr}/");
    match bandwatch::serve(cfg, listener, shutdown_signal()).await {
        Ok(()) => {
            tracing::info!("stopped");
            ExitCode::SUCCESS
        }
        Err(e) => {
            tracing::error!(error = %e, "bandwatch failed");
            ExitCode::FAILURE
        }
    }
}

/// Resolves on SIGINT or SIGTERM.
async fn shutdown_signal() {
    let ctrl_c = async {
        if let Err(e) = tokio::signal::ctrl_c().await {
            tracing::warn!(error = %e, "cannot listen for ctrl-c");
            std::future::pending::<()>().await;
        }
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(e) => {
                tracing::warn!(error = %e, "cannot listen for SIGTERM");
                std::future::pending::<()>().await;
            }
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => tracing::info!("SIGINT: shutting down"),
        _ = term => tracing::info!("SIGTERM: shutting down"),
    }
}

fn init_tracing(format: LogFormat) {
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    match format {
        LogFormat::Text => builder.init(),
        LogFormat::Json => builder.json().init(),
    }
}
