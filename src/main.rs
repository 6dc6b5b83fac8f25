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
    /// Act as a DAQ box: stream the demo pump over BWF1 (or lines).
    Send {
        /// tcp://HOST:PORT (dial), tcp-serve://HOST:PORT (listen, for a
        /// tcp-connect daemon), udp://HOST:PORT, or serial:PATH.
        #[arg(long)]
        to: bandwatch::tools::Endpoint,
        /// Only "demo" (the P2 pump) exists.
        #[arg(long, default_value = "demo")]
        scenario: String,
        /// Play this many times faster than real time.
        #[arg(long, default_value_t = 1.0)]
        rate_x: f64,
        /// Seconds of signal to send (default: until interrupted).
        #[arg(long)]
        seconds: Option<f64>,
        /// Sample format: f32 (values in g), i24, i32 or i16 (counts), f64.
        #[arg(long, default_value = "f32")]
        format: String,
        /// "bwf1" or "lines" (text, values in g; TCP or serial only).
        #[arg(long, default_value = "bwf1")]
        framing: String,
        /// Instants per frame.
        #[arg(long, default_value_t = 256)]
        frame_samples: usize,
        #[arg(long, default_value_t = 2)]
        seed: u64,
        /// Do not send every Nth frame.
        #[arg(long, default_value_t = 0)]
        drop_every: u64,
        /// Flip a byte in every Nth frame.
        #[arg(long, default_value_t = 0)]
        corrupt_every: u64,
        /// Send every Nth frame twice.
        #[arg(long, default_value_t = 0)]
        duplicate_every: u64,
        /// Send every Nth frame after the one that follows it.
        #[arg(long, default_value_t = 0)]
        reorder_every: u64,
    },
    /// Store a raw stream as received.
    Record {
        /// tcp://HOST:PORT (dial), tcp-serve://HOST:PORT (listen),
        /// udp://BIND:PORT, or serial:PATH.
        #[arg(long)]
        from: bandwatch::tools::Endpoint,
        #[arg(long)]
        out: PathBuf,
        /// Stop after this many seconds (default: until the peer closes or ctrl-c).
        #[arg(long)]
        seconds: Option<f64>,
    },
    /// Run a recorded stream, or an alarm capture, through the pipeline as
    /// fast as possible and print one JSON line per spectrum. A capture
    /// (its .json or .bwf1) needs no config: its trip spectrum and band
    /// values are recomputed and compared. Exits non-zero when no frame
    /// was accepted.
    Replay {
        /// A recording, or a capture's .json or .bwf1.
        file: PathBuf,
        /// The config of the source that received the recording; for a
        /// capture only if it was written without its channel settings.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Source of the config the file feeds (default: the first network or serial one).
        #[arg(long)]
        source: Option<String>,
    },
    /// Measure published check values through this build's DSP and print a
    /// pass table; exits 0 only if every check passes.
    Selftest {
        /// Print JSON instead of the table.
        #[arg(long)]
        json: bool,
    },
    /// Measure stage throughput, ingest, HTTP latency and memory side by side.
    Bench(bandwatch::tools::bench::BenchArgs),
    /// Print a shell completion script on stdout, e.g.
    /// `bandwatch completions bash > /etc/bash_completion.d/bandwatch`.
    Completions {
        /// The shell to complete for.
        #[arg(value_enum)]
        shell: clap_complete::Shell,
    },
    /// Write the man pages (bandwatch.1 and bandwatch-COMMAND.1 for every
    /// command) into a directory.
    Man {
        /// Directory for the pages (created if missing).
        #[arg(long)]
        out_dir: PathBuf,
    },
    /// Run this daemon as a child under faults and HTTP load, then assert
    /// exact accounting, monotonic counters, flat memory and /healthz
    /// latency; exits non-zero on any failed check.
    Soak(bandwatch::tools::soak::SoakArgs),
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    init_tracing(cli.log_format);
    match cli.command {
        Command::Selftest { json } => {
            use bandwatch::tools::selftest;
            use std::io::Write as _;
            let checks = selftest::run();
            let text = if json {
                selftest::render_json(&checks) + "\n"
            } else {
                selftest::render_table(&checks)
            };
            // A closed pipe (`| head`) is not a failed check: ignore it.
            let _ = std::io::stdout().lock().write_all(text.as_bytes());
            if selftest::all_pass(&checks) {
                ExitCode::SUCCESS
            } else {
                ExitCode::FAILURE
            }
        }
        Command::Bench(args) => match bandwatch::tools::bench::run(&args) {
            Ok(()) => ExitCode::SUCCESS,
            Err(e) => {
                eprintln!("bench: {e}");
                ExitCode::FAILURE
            }
        },
        Command::Completions { shell } => completions(shell),
        Command::Man { out_dir } => man_pages(&out_dir),
        Command::Soak(args) => {
            use std::io::Write as _;
            match bandwatch::tools::soak::run(&args) {
                Ok(report) => {
                    let text = if args.json {
                        serde_json::to_string_pretty(&report).unwrap_or_default() + "\n"
                    } else {
                        report.table()
                    };
                    let _ = std::io::stdout().lock().write_all(text.as_bytes());
                    if report.passed() {
                        ExitCode::SUCCESS
                    } else {
                        ExitCode::FAILURE
                    }
                }
                Err(e) => {
                    eprintln!("soak: {e}");
                    ExitCode::FAILURE
                }
            }
        }
        Command::Check { config } => match bandwatch::config::load(&config) {
            Ok(c) => {
                println!(
                    "{}: ok ({} source(s), {} channel(s), {} band(s))",
                    config.display(),
                    c.sources.len(),
                    c.channels.len(),
                    c.channels.iter().map(|c| c.bands.len()).sum::<usize>()
                );
                if let Some(w) = &c.web {
                    println!(
                        "{}: ok (TLS {}, {} basic-auth user(s))",
                        w.path.display(),
                        if w.tls.is_some() { "on" } else { "off" },
                        w.users.len()
                    );
                }
                ExitCode::SUCCESS
            }
            Err(e) => {
                eprintln!("{e}");
                ExitCode::from(2)
            }
        },
        Command::Send {
            to,
            scenario,
            rate_x,
            seconds,
            format,
            framing,
            frame_samples,
            seed,
            drop_every,
            corrupt_every,
            duplicate_every,
            reorder_every,
        } => {
            use bandwatch::frame::SampleFormat;
            use bandwatch::tools::send::{send, Faults, SendOptions, WireFormat};
            if scenario != "demo" {
                eprintln!("unknown scenario {scenario:?} (known: demo)");
                return ExitCode::from(2);
            }
            if !(rate_x.is_finite() && rate_x > 0.0) {
                eprintln!("--rate-x must be a number above 0");
                return ExitCode::from(2);
            }
            let wire = match framing.as_str() {
                "lines" => WireFormat::Lines,
                "bwf1" => match SampleFormat::ALL.into_iter().find(|f| f.as_str() == format) {
                    Some(f) => WireFormat::Bwf1(f),
                    None => {
                        eprintln!("unknown --format {format:?} (i16, i24, i32, f32, f64)");
                        return ExitCode::from(2);
                    }
                },
                other => {
                    eprintln!("unknown --framing {other:?} (bwf1, lines)");
                    return ExitCode::from(2);
                }
            };
            let opts = SendOptions {
                to,
                format: wire,
                rate_x,
                seconds,
                frame_samples,
                seed,
                faults: Faults {
                    drop_every,
                    corrupt_every,
                    duplicate_every,
                    reorder_every,
                },
            };
            block_on(async move {
                match send(opts, shutdown_signal()).await {
                    Ok(r) => {
                        println!("{}", serde_json::to_string(&r).unwrap_or_default());
                        ExitCode::SUCCESS
                    }
                    Err(e) => {
                        eprintln!("send: {e}");
                        ExitCode::FAILURE
                    }
                }
            })
        }
        Command::Record { from, out, seconds } => block_on(async move {
            match bandwatch::tools::record::record(&from, &out, seconds, shutdown_signal()).await {
                Ok(r) => {
                    println!("{}", serde_json::to_string(&r).unwrap_or_default());
                    ExitCode::SUCCESS
                }
                Err(e) => {
                    eprintln!("record: {e}");
                    ExitCode::FAILURE
                }
            }
        }),
        Command::Replay {
            file,
            config,
            source,
        } => {
            let cfg = match config.as_deref().map(bandwatch::config::load).transpose() {
                Ok(c) => c,
                Err(e) => {
                    eprintln!("{e}");
                    return ExitCode::from(2);
                }
            };
            let stdout = std::io::stdout();
            let mut lock = std::io::BufWriter::new(stdout.lock());
            if bandwatch::tools::replay::is_capture(&file) {
                return match bandwatch::tools::replay::replay_capture(
                    &file,
                    cfg.as_ref(),
                    &mut lock,
                ) {
                    Ok(r) => {
                        tracing::info!(
                            capture = %r.meta.id,
                            from_sample = r.from_sample,
                            frames = bandwatch::counters::SourceCounters::get(&r.counters.frames),
                            "replay done"
                        );
                        if let Some(c) = &r.check {
                            eprintln!("replay: {c}");
                        }
                        if let Some(p) = &r.problem {
                            eprintln!("replay: {p}");
                        }
                        ExitCode::SUCCESS
                    }
                    Err(e) => {
                        eprintln!("replay: {e}");
                        ExitCode::FAILURE
                    }
                };
            }
            let Some(cfg) = cfg else {
                eprintln!(
                    "replay: {} is not an alarm capture; a recording needs --config",
                    file.display()
                );
                return ExitCode::from(2);
            };
            match bandwatch::tools::replay::replay(&cfg, &file, source.as_deref(), &mut lock) {
                Ok(state) => {
                    let rejected = state.rejected();
                    tracing::info!(
                        frames = bandwatch::counters::SourceCounters::get(&state.frames),
                        missing = bandwatch::counters::SourceCounters::get(&state.samples_missing),
                        ?rejected,
                        "replay done"
                    );
                    ExitCode::SUCCESS
                }
                Err(e) => {
                    eprintln!("replay: {e}");
                    ExitCode::FAILURE
                }
            }
        }
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

fn block_on<F: std::future::Future<Output = ExitCode>>(f: F) -> ExitCode {
    match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(rt) => rt.block_on(f),
        Err(e) => {
            eprintln!("cannot start the async runtime: {e}");
            ExitCode::FAILURE
        }
    }
}

/// `completions SHELL`: the script on stdout.
fn completions(shell: clap_complete::Shell) -> ExitCode {
    use clap::CommandFactory as _;
    use std::io::Write as _;
    let mut script = Vec::new();
    clap_complete::generate(shell, &mut Cli::command(), "bandwatch", &mut script);
    match std::io::stdout().lock().write_all(&script) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("completions: cannot write to stdout: {e}");
            ExitCode::FAILURE
        }
    }
}

/// `man --out-dir DIR`: bandwatch.1 and one page per command.
fn man_pages(out_dir: &std::path::Path) -> ExitCode {
    use clap::CommandFactory as _;
    let written = std::fs::create_dir_all(out_dir)
        .and_then(|()| clap_mangen::generate_to(Cli::command(), out_dir));
    match written {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("man: cannot write the pages to {}: {e}", out_dir.display());
            ExitCode::FAILURE
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
    let scheme = if cfg.web.as_ref().is_some_and(|w| w.tls.is_some()) {
        "https"
    } else {
        "http"
    };
    tracing::info!(%addr, channels = cfg.channels.len(), "bandwatch listening on {scheme}://{addr}/");
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
