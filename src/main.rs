use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand, ValueEnum};

/// bandwatch: rolling spectra, band levels and alarms for live DAQ channels.
///
/// Exit codes: 0 success; 1 an error, a failed check, an invalid config
/// or environment; 2 a usage error (bad option or value). README, "Exit codes".
#[derive(Debug, Parser)]
#[command(version, about)]
struct Cli {
    /// Log format on stderr (one event per line).
    #[arg(long, value_enum, default_value_t = LogFormat::Text, global = true)]
    log_format: LogFormat,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
enum LogFormat {
    /// Human-readable; colour only on a terminal without NO_COLOR.
    Text,
    /// One JSON object per line, fields as JSON values.
    Json,
}

/// `send --scenario`.
#[derive(Debug, Clone, Copy, ValueEnum)]
enum Scenario {
    /// The cooling-water pump P2 of config/demo.toml.
    Demo,
}

/// `send --framing`.
#[derive(Debug, Clone, Copy, ValueEnum)]
enum SendFraming {
    /// Binary BWF1 frames (header, samples, CRC).
    Bwf1,
    /// Text lines, values in g (TCP or serial only).
    Lines,
}

/// `send --format`: the BWF1 sample format.
#[derive(Debug, Clone, Copy, ValueEnum)]
enum SendFormat {
    /// 16-bit counts.
    I16,
    /// 24-bit counts.
    I24,
    /// 32-bit counts.
    I32,
    /// 32-bit floats, values in g.
    F32,
    /// 64-bit floats, values in g.
    F64,
}

impl SendFormat {
    fn sample_format(self) -> bandwatch::frame::SampleFormat {
        use bandwatch::frame::SampleFormat as F;
        match self {
            SendFormat::I16 => F::I16,
            SendFormat::I24 => F::I24,
            SendFormat::I32 => F::I32,
            SendFormat::F32 => F::F32,
            SendFormat::F64 => F::F64,
        }
    }
}

// Parsed once at start and moved into its arm: the size of the bench
// variant costs nothing.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Subcommand)]
enum Command {
    /// Run the daemon.
    Run {
        /// Config file (TOML); relative paths in it resolve against its directory.
        #[arg(long)]
        config: PathBuf,
        /// Listen address for HTTP, overriding `server.listen`.
        #[arg(long)]
        listen: Option<SocketAddr>,
        /// Directory a relative `[alarms] storage_dir` resolves against
        /// (default: $STATE_DIRECTORY, its first entry, when systemd sets
        /// it; else the config file's directory).
        #[arg(long)]
        state_dir: Option<PathBuf>,
    },
    /// Validate a config file and the environment it would run in; print
    /// every problem found (exit 1 if any).
    Check {
        /// Config file (TOML) to check.
        #[arg(long)]
        config: PathBuf,
        /// As `run --state-dir`: where a relative storage_dir resolves.
        #[arg(long)]
        state_dir: Option<PathBuf>,
        /// Check the file only: not the storage directory, token file,
        /// serial devices or listen addresses.
        #[arg(long)]
        no_env: bool,
    },
    /// Act as a DAQ box: stream the demo pump over BWF1 (or lines).
    Send {
        /// tcp://HOST:PORT (dial), tcp-serve://HOST:PORT (listen, for a
        /// tcp-connect daemon), udp://HOST:PORT, or serial:PATH.
        #[arg(long)]
        to: bandwatch::tools::Endpoint,
        /// Signal to play.
        #[arg(long, value_enum, default_value_t = Scenario::Demo)]
        scenario: Scenario,
        /// Play this many times faster than real time.
        #[arg(long, default_value_t = 1.0)]
        rate_x: f64,
        /// Seconds of signal to send (default: until interrupted).
        #[arg(long)]
        seconds: Option<f64>,
        /// Sample format of BWF1 frames.
        #[arg(long, value_enum, default_value_t = SendFormat::F32)]
        format: SendFormat,
        /// Wire framing.
        #[arg(long, value_enum, default_value_t = SendFraming::Bwf1)]
        framing: SendFraming,
        /// Instants per frame.
        #[arg(long, default_value_t = 256)]
        frame_samples: usize,
        /// Seed of the simulator's noise (the same seed, the same samples).
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
        /// File to write the stream into.
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
        shell: CompletionShell,
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

/// The directory a relative storage_dir resolves against: the flag, else
/// `$STATE_DIRECTORY` (systemd's `StateDirectory=`; the first of a
/// colon-separated list), else none (the config file's directory).
fn state_dir(flag: Option<PathBuf>) -> Option<PathBuf> {
    flag.or_else(|| {
        let v = std::env::var_os("STATE_DIRECTORY")?;
        let first = v.to_string_lossy().split(':').next()?.to_string();
        (!first.is_empty()).then(|| PathBuf::from(first))
    })
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    bandwatch::daemon::logs::init(match cli.log_format {
        LogFormat::Text => bandwatch::daemon::logs::Format::Text,
        LogFormat::Json => bandwatch::daemon::logs::Format::Json,
    });
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
            Err(e @ bandwatch::tools::bench::BenchError::Usage(_)) => {
                eprintln!("bench: {e}");
                ExitCode::from(2)
            }
            Err(e) => {
                eprintln!("bench: {e}");
                ExitCode::FAILURE
            }
        },
        Command::Completions { shell } => completions(shell.into()),
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
        Command::Check {
            config,
            state_dir: dir,
            no_env,
        } => check(&config, state_dir(dir).as_deref(), no_env),
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
            use bandwatch::tools::send::{send, Faults, SendOptions, WireFormat};
            let Scenario::Demo = scenario;
            if !(rate_x.is_finite() && rate_x > 0.0) {
                eprintln!("--rate-x must be a number above 0");
                return ExitCode::from(2);
            }
            let wire = match framing {
                SendFraming::Lines => WireFormat::Lines,
                SendFraming::Bwf1 => WireFormat::Bwf1(format.sample_format()),
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
                    return ExitCode::FAILURE;
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
                    // By reason, as a JSON object in the log line.
                    let rejected: std::collections::BTreeMap<&str, u64> =
                        state.rejected().into_iter().collect();
                    tracing::info!(
                        frames = bandwatch::counters::SourceCounters::get(&state.frames),
                        missing = bandwatch::counters::SourceCounters::get(&state.samples_missing),
                        rejected = %serde_json::to_string(&rejected).unwrap_or_default(),
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
        Command::Run {
            config,
            listen,
            state_dir: dir,
        } => {
            let state_dir = state_dir(dir);
            let mut cfg = match load_config(&config, state_dir.as_deref()) {
                Ok(c) => c,
                Err(e) => {
                    eprintln!("{e}");
                    return ExitCode::FAILURE;
                }
            };
            if let Err(issue) = bandwatch::config::environment::token_file_mode(&cfg) {
                eprintln!("{}: {issue}", config.display());
                return ExitCode::FAILURE;
            }
            if let Some(l) = listen {
                cfg.listen = l;
            }
            // SIGHUP and POST /api/v1/reload re-read the same file, with
            // the same --listen override and state directory.
            let loader: bandwatch::pipeline::reload::ConfigLoader =
                std::sync::Arc::new(move || {
                    let mut c = load_config(&config, state_dir.as_deref())?;
                    if let Some(l) = listen {
                        c.listen = l;
                    }
                    Ok(c)
                });
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
            rt.block_on(run(cfg, loader))
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

/// The shells `completions` writes a script for (clap_complete's, each
/// with its help text, which `clap_complete::Shell` has not).
#[derive(Debug, Clone, Copy, ValueEnum)]
enum CompletionShell {
    /// GNU bash (bash-completion).
    Bash,
    /// Elvish.
    Elvish,
    /// fish.
    Fish,
    /// PowerShell.
    Powershell,
    /// zsh.
    Zsh,
}

impl From<CompletionShell> for clap_complete::Shell {
    fn from(s: CompletionShell) -> Self {
        match s {
            CompletionShell::Bash => Self::Bash,
            CompletionShell::Elvish => Self::Elvish,
            CompletionShell::Fish => Self::Fish,
            CompletionShell::Powershell => Self::PowerShell,
            CompletionShell::Zsh => Self::Zsh,
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

async fn run(
    cfg: bandwatch::config::Config,
    loader: bandwatch::pipeline::reload::ConfigLoader,
) -> ExitCode {
    // First of all: from here on a stop request is not missed, and a SIGHUP
    // does not kill the starting daemon. Installing tokio's SIGHUP handler
    // replaces the default action (end the process) for good; one that
    // arrives before the reloader listens is ignored (the file was just
    // read), and the reloader takes its own receiver.
    let shutdown = shutdown_signal();
    #[cfg(unix)]
    if let Err(e) = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup()) {
        tracing::warn!(error = %e, "cannot handle SIGHUP: it would end the daemon");
    }
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
    match bandwatch::daemon::serve_with(cfg, listener, shutdown, Some(loader)).await {
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

/// Installs the SIGINT and SIGTERM handlers now (so a stop request that
/// arrives while the daemon starts is kept for the returned future, not
/// missed) and returns a future that resolves on SIGINT or SIGTERM.
#[cfg(unix)]
fn shutdown_signal() -> impl std::future::Future<Output = ()> {
    use tokio::signal::unix::{signal, SignalKind};
    let int = signal(SignalKind::interrupt());
    let term = signal(SignalKind::terminate());
    async move {
        let wait = |s: std::io::Result<tokio::signal::unix::Signal>, name: &'static str| async move {
            match s {
                Ok(mut s) => {
                    s.recv().await;
                }
                Err(e) => {
                    tracing::warn!(error = %e, "cannot listen for {name}");
                    std::future::pending::<()>().await;
                }
            }
        };
        tokio::select! {
            _ = wait(int, "SIGINT") => tracing::info!("SIGINT: shutting down"),
            _ = wait(term, "SIGTERM") => tracing::info!("SIGTERM: shutting down"),
        }
    }
}

/// Resolves on ctrl-c.
#[cfg(not(unix))]
fn shutdown_signal() -> impl std::future::Future<Output = ()> {
    async {
        if let Err(e) = tokio::signal::ctrl_c().await {
            tracing::warn!(error = %e, "cannot listen for ctrl-c");
            std::future::pending::<()>().await;
        }
        tracing::info!("SIGINT: shutting down");
    }
}

/// Reads and checks the config file, and its `[metrics] exclude` against
/// the families it exports (known to the HTTP layer, above the config).
fn load_config(
    path: &std::path::Path,
    state_dir: Option<&std::path::Path>,
) -> Result<bandwatch::config::Config, bandwatch::config::ConfigError> {
    let c = bandwatch::config::load_with(path, state_dir)?;
    let issues = bandwatch::http::metrics::check_exposition(&c);
    if issues.is_empty() {
        Ok(c)
    } else {
        Err(bandwatch::config::ConfigError::Invalid {
            path: path.to_path_buf(),
            issues,
        })
    }
}

/// `bandwatch check`: the file, then (unless `no_env`) the environment.
fn check(config: &std::path::Path, state_dir: Option<&std::path::Path>, no_env: bool) -> ExitCode {
    let c = match load_config(config, state_dir) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("{e}");
            return ExitCode::FAILURE;
        }
    };
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
    if let Some(h) = &c.history {
        history_size(h, &c.channels);
    }
    if no_env {
        return ExitCode::SUCCESS;
    }
    let issues = bandwatch::config::environment::check_environment(&c);
    if issues.is_empty() {
        println!("{}: environment ok", config.display());
        return ExitCode::SUCCESS;
    }
    eprintln!(
        "{}: the environment has {} problem(s):",
        config.display(),
        issues.len()
    );
    for i in &issues {
        eprintln!("  - {i}");
    }
    ExitCode::FAILURE
}

/// `check`: the history file's steady-state size against `max_mb`
/// (`history::sizing`); a warning, not a failure, as it is an estimate.
fn history_size(h: &bandwatch::config::HistorySpec, channels: &[bandwatch::config::ChannelSpec]) {
    use bandwatch::history::sizing;
    let e = sizing::estimate(h, channels);
    let mb = |b: u64| b as f64 / (1u64 << 20) as f64;
    println!(
        "{}: about {:.0} MB at steady state: {:.0} MB of aggregates ({} rows, {} days), \
         {:.0} MB of timer spectra at most ({} days, before compression); max_mb {:.0}",
        h.file.display(),
        mb(e.aggregate_bytes + e.spectra_bytes),
        mb(e.aggregate_bytes),
        e.rows,
        h.keep_days,
        mb(e.spectra_bytes),
        h.spectra_keep_days,
        mb(h.max_bytes)
    );
    if e.aggregates_over(h) {
        eprintln!(
            "warning: history: the aggregates alone (about {:.0} MB) exceed max_mb = {:.0}, and \
             retention does not delete them for it: raise max_mb, or lower keep_days or \
             thin_after_days, or raise interval_s (docs/history.md \"Sizing\")",
            mb(e.aggregate_bytes),
            mb(h.max_bytes)
        );
    } else if let Some(days) = sizing::SizeEstimate::spectra_days_fitting(&e, h) {
        eprintln!(
            "warning: history: max_mb = {:.0} leaves room for about {days:.0} days of timer \
             spectra, not spectra_keep_days = {}: the oldest are deleted first \
             (docs/history.md \"Sizing\")",
            mb(h.max_bytes),
            h.spectra_keep_days
        );
    }
}

#[cfg(test)]
mod tests {
    use super::Cli;
    use clap::CommandFactory as _;

    /// Every subcommand and every option (positional ones too) of the
    /// whole tree has a help text, and every enumerated value one too.
    #[test]
    fn every_option_and_subcommand_has_help() {
        fn walk(cmd: &clap::Command, path: &str, missing: &mut Vec<String>) {
            for a in cmd.get_arguments() {
                let id = a.get_id().as_str();
                if a.is_hide_set() || id == "help" || id == "version" {
                    continue;
                }
                if a.get_help().is_none() && a.get_long_help().is_none() {
                    missing.push(format!("{path} --{id}"));
                }
                let values = if a.get_action().takes_values() {
                    a.get_possible_values()
                } else {
                    Vec::new() // a flag's true/false
                };
                for v in values {
                    if !v.is_hide_set() && v.get_help().is_none() {
                        missing.push(format!("{path} --{id} {}", v.get_name()));
                    }
                }
            }
            for sub in cmd.get_subcommands() {
                let p = format!("{path} {}", sub.get_name());
                if sub.get_name() != "help" && sub.get_about().is_none() {
                    missing.push(p.clone());
                }
                walk(sub, &p, missing);
            }
        }
        let cmd = Cli::command();
        cmd.clone().debug_assert();
        let mut missing = Vec::new();
        walk(&cmd, "bandwatch", &mut missing);
        assert!(missing.is_empty(), "no help text: {missing:#?}");
    }
}
