//! `/metrics`: Prometheus text exposition.
//!
//! Two kinds of series:
//!
//! - static ones the process updates itself (`bandwatch_build_info`,
//!   `bandwatch_start_time_seconds`, `bandwatch_http_requests_total`), kept
//!   in a prometheus crate `Registry` and encoded by its `TextEncoder`;
//! - everything derived from channels and sources, written by
//!   [`PipelineCollector`] at scrape time from the latest snapshots and
//!   counters, straight into text. One scrape reads each snapshot once
//!   (never half old, half new), and a channel that is gone leaves no stale
//!   series.
//!
//! The direct encoder writes what `Registry::gather` + `TextEncoder` would
//! (families sorted by name, series by label values, values as Rust
//! prints an `f64`), without building a `prometheus::proto` object per
//! series: label sets are escaped once when the collector is built (names
//! are fixed by the config), the text goes into per-family buffers reused
//! from scrape to scrape, and integral values skip float formatting. The
//! one difference: non-finite values are written `+Inf`, `-Inf`, `NaN` as
//! the text format specifies (the crate wrote Rust's `inf`).
//!
//! A rendered body is shared by the scrapes that arrive within
//! [`RENDER_MAX_AGE`] of the start of its render; never longer.
//!
//! Files: `families` (the fixed families and the naming of the
//! config-dependent ones), `process` (the `process_*` series from
//! `/proc/self`), `walk` (the one walk of the state, feeding any
//! encoder), `text` (the direct encoder), `proto` (tests: the reference
//! encoder on the prometheus crate).
//!
//! Names follow the Prometheus naming guide: `bandwatch_` prefix, SI base
//! units in the name (values are converted with `Unit::to_si`), `_total` on
//! counters, help strings as sentences, bounded labels (channel, band,
//! source, kind, reason, path, status).

mod families;
pub mod process;
#[cfg(test)]
pub(crate) mod proto;
mod text;
mod walk;

use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use axum::body::Bytes;
use axum::http::StatusCode;
use prometheus::{
    Encoder, Gauge, IntCounter, IntCounterVec, IntGauge, IntGaugeVec, Opts, Registry, TextEncoder,
};

#[cfg(test)]
pub(crate) use families::fixed_order;
pub use text::{push_escaped, push_value, PipelineCollector};

use crate::clock::unix_now_ns;
use crate::http::server::CloseReason;
use crate::pipeline::state::{AppState, LiveState};

/// Content type of the text exposition format.
pub const CONTENT_TYPE: &str = prometheus::TEXT_FORMAT;

/// Longest time a rendered `/metrics` body is served again: scrapes within
/// this time of the start of a render share its body. Snapshots change
/// only when a channel publishes (every hop × averages / fs, 0.32 s at the
/// demo's settings), so a scrape sees values at most this much older than
/// an uncached render would show.
pub const RENDER_MAX_AGE: Duration = Duration::from_millis(200);

/// `bandwatch_build_info`'s labels: version, git commit (12 hex digits,
/// "unknown" when built outside a git checkout) and target triple, as
/// build.rs found them.
pub const BUILD_LABELS: [&str; 3] = [
    env!("CARGO_PKG_VERSION"),
    env!("BANDWATCH_GIT_COMMIT"),
    env!("BANDWATCH_TARGET"),
];

/// Monotonic time for the render cache (tests step it by hand).
pub type MonoClock = Arc<dyn Fn() -> Duration + Send + Sync>;

fn process_mono() -> Duration {
    static BASE: std::sync::OnceLock<Instant> = std::sync::OnceLock::new();
    BASE.get_or_init(Instant::now).elapsed()
}

/// The last rendered body, when its render started, and the state it
/// was rendered from (a reload publishes a new one: the body is stale).
struct Cached {
    at: Duration,
    body: Bytes,
    app: Arc<AppState>,
}

/// The config reload series, named as Prometheus names its own
/// (`prometheus_config_last_reload_successful`, ...), set from the
/// state's `ReloadStats` at each render.
#[derive(Clone)]
pub(crate) struct ReloadMetrics {
    total: IntCounterVec,
    last_ok: IntGauge,
    last_success: Gauge,
}

impl ReloadMetrics {
    pub(crate) fn register(registry: &Registry) -> Option<ReloadMetrics> {
        let m = ReloadMetrics {
            total: IntCounterVec::new(
                Opts::new(
                    "bandwatch_config_reloads_total",
                    "Config reloads (SIGHUP or POST /api/v1/reload), by result.",
                ),
                &["result"],
            )
            .ok()?,
            last_ok: IntGauge::new(
                "bandwatch_config_last_reload_successful",
                "1 if the last config reload (or the start) succeeded, else 0.",
            )
            .ok()?,
            last_success: Gauge::new(
                "bandwatch_config_last_reload_success_timestamp_seconds",
                "Time the config last loaded successfully (reload or start), in seconds since the Unix epoch.",
            )
            .ok()?,
        };
        register(registry, Box::new(m.total.clone()));
        register(registry, Box::new(m.last_ok.clone()));
        register(registry, Box::new(m.last_success.clone()));
        Some(m)
    }

    /// Sets the series from `app`'s counts (counters only ever go up:
    /// the difference is added).
    pub(crate) fn sync(&self, app: &AppState) {
        use std::sync::atomic::Ordering::Relaxed;
        let r = &app.reloads;
        for (label, n) in [
            ("success", r.successes.load(Relaxed)),
            ("failure", r.failures.load(Relaxed)),
        ] {
            let c = self.total.with_label_values(&[label]);
            let have = c.get();
            if n > have {
                c.inc_by(n - have);
            }
        }
        self.last_ok.set(i64::from(r.last_successful.load(Relaxed)));
        self.last_success
            .set(app.last_config_success_unix_ns() as f64 * 1e-9);
    }
}

/// `[metrics] exclude` against the families `config` exports: an entry
/// that matches none of the channel, band, alarm, source, machine or
/// storage families is a mistake (a typo, or one of the daemon's own
/// families, which are always exported) and is reported at its index.
/// `bandwatch check`, the start and every reload run this.
pub fn check_exposition(config: &crate::config::Config) -> Vec<crate::config::ConfigIssue> {
    let layout = walk::DynLayout::new(config.channels.iter());
    config
        .exposition
        .exclude
        .iter()
        .enumerate()
        .filter(|(_, p)| !layout.names().any(|n| p.matches(n)))
        .map(|(k, p)| crate::config::ConfigIssue {
            path: format!("metrics.exclude[{k}]"),
            message: format!(
                "\"{p}\" matches no family this config exports (the daemon's own \
                 bandwatch_build_info, bandwatch_http_*, bandwatch_config_*, \
                 bandwatch_start_time_seconds and process_* are always exported)"
            ),
        })
        .collect()
}

/// The registry behind `/metrics`, the static series the HTTP layer
/// updates, and the render cache.
pub struct Metrics {
    registry: Registry,
    /// `None` only if the prometheus crate refused its constant options.
    http_requests: Option<IntCounterVec>,
    reloads: Option<ReloadMetrics>,
    /// The published state; the collector is rebuilt when a reload
    /// replaces it (its label sets follow the config).
    live: LiveState,
    clock: fn() -> u64,
    collector: Mutex<Arc<PipelineCollector>>,
    connections: ConnectionMetrics,
    max_age: Duration,
    mono: MonoClock,
    /// Whether the `process_*` series are exported (off where the
    /// exposition must be reproducible: the golden file, the reference
    /// encoder's comparison).
    process: bool,
    cache: Mutex<Option<Cached>>,
    /// Held while rendering, so that concurrent scrapes wait for one
    /// render instead of each doing their own.
    rendering: Mutex<()>,
}

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

impl Metrics {
    /// Builds the registry for `app`. Registration can only fail on a
    /// programming error (two families of one name); that is logged and
    /// the remaining metrics are still served.
    pub fn new(app: Arc<AppState>) -> Metrics {
        let live = Arc::new(arc_swap::ArcSwap::new(app));
        Metrics::live(live)
    }

    /// As [`Metrics::new`], with the wall clock used for ages replaced
    /// (tests pin it to get a reproducible exposition) and without the
    /// `process_*` series (they change by themselves).
    pub fn with_clock(app: Arc<AppState>, clock: fn() -> u64) -> Metrics {
        Metrics::with_cache(app, clock, RENDER_MAX_AGE, Arc::new(process_mono))
    }

    /// As [`Metrics::with_clock`], with the cache's max-age and monotonic
    /// clock given (tests step the clock; `Duration::ZERO` disables the
    /// cache).
    pub fn with_cache(
        app: Arc<AppState>,
        clock: fn() -> u64,
        max_age: Duration,
        mono: MonoClock,
    ) -> Metrics {
        let live = Arc::new(arc_swap::ArcSwap::new(app));
        Metrics::with_live(live, clock, max_age, mono, false)
    }

    /// The metrics of a state a reload may replace.
    pub fn live(live: LiveState) -> Metrics {
        Metrics::with_live(
            live,
            unix_now_ns,
            RENDER_MAX_AGE,
            Arc::new(process_mono),
            true,
        )
    }

    fn with_live(
        live: LiveState,
        clock: fn() -> u64,
        max_age: Duration,
        mono: MonoClock,
        process: bool,
    ) -> Metrics {
        let app = live.load_full();
        let registry = Registry::new();
        let http_requests = IntCounterVec::new(
            Opts::new(
                "bandwatch_http_requests_total",
                "HTTP requests answered, by route template and status code.",
            ),
            &["path", "status"],
        );
        let build_info = IntGaugeVec::new(
            Opts::new(
                "bandwatch_build_info",
                "Always 1; the labels name the running bandwatch build.",
            ),
            &["version", "commit", "target"],
        );
        let start_time = Gauge::new(
            "bandwatch_start_time_seconds",
            "Time the process started, in seconds since the Unix epoch.",
        );
        let http_requests = match http_requests {
            Ok(c) => {
                register(&registry, Box::new(c.clone()));
                Some(c)
            }
            Err(e) => {
                tracing::error!(error = %e, "cannot create the HTTP request counter");
                None
            }
        };
        if let Ok(g) = build_info {
            g.with_label_values(&BUILD_LABELS).set(1);
            register(&registry, Box::new(g));
        }
        if let Ok(g) = start_time {
            g.set(app.started_unix_ns as f64 * 1e-9);
            register(&registry, Box::new(g));
        }
        let connections = ConnectionMetrics::register(&registry);
        let reloads = ReloadMetrics::register(&registry);
        if reloads.is_none() {
            tracing::error!("cannot create the config reload metrics");
        }
        Metrics {
            registry,
            http_requests,
            reloads,
            connections,
            collector: Mutex::new(Arc::new(PipelineCollector::new(app, clock))),
            live,
            clock,
            max_age,
            mono,
            process,
            cache: Mutex::new(None),
            rendering: Mutex::new(()),
        }
    }

    /// The connection series the accept loop updates.
    pub fn connections(&self) -> ConnectionMetrics {
        self.connections.clone()
    }

    /// Counts one answered request under its route template.
    pub fn observe_request(&self, path: &str, status: StatusCode) {
        if let Some(c) = &self.http_requests {
            c.with_label_values(&[path, status.as_str()]).inc();
        }
    }

    /// The body cached less than the max-age ago, if any.
    pub fn cached(&self) -> Option<Bytes> {
        let now = (self.mono)();
        let app = self.live.load();
        let c = lock(&self.cache);
        c.as_ref()
            .filter(|c| now.saturating_sub(c.at) < self.max_age && Arc::ptr_eq(&c.app, &*app))
            .map(|c| c.body.clone())
    }

    /// The text exposition: the cached body if it is younger than the
    /// max-age, else a new render (one at a time: a scrape that arrives
    /// during a render waits for it and shares its body).
    ///
    /// # Errors
    /// If the encoder rejects a static family (a programming error).
    pub fn render(&self) -> Result<Bytes, prometheus::Error> {
        if let Some(b) = self.cached() {
            return Ok(b);
        }
        let _one = lock(&self.rendering);
        if let Some(b) = self.cached() {
            return Ok(b);
        }
        let at = (self.mono)();
        let app = self.live.load_full();
        let body = Bytes::from(self.render_of(&app)?);
        if !self.max_age.is_zero() {
            *lock(&self.cache) = Some(Cached {
                at,
                body: body.clone(),
                app,
            });
        }
        Ok(body)
    }

    /// Renders the exposition now, bypassing the cache.
    ///
    /// # Errors
    /// If the encoder rejects a static family (a programming error).
    pub fn render_fresh(&self) -> Result<Vec<u8>, prometheus::Error> {
        self.render_of(&self.live.load_full())
    }

    fn render_of(&self, app: &Arc<AppState>) -> Result<Vec<u8>, prometheus::Error> {
        let collector = {
            let mut c = lock(&self.collector);
            if !Arc::ptr_eq(c.app(), app) {
                *c = Arc::new(PipelineCollector::new(app.clone(), self.clock));
            }
            c.clone()
        };
        if let Some(r) = &self.reloads {
            r.sync(app);
        }
        let mut statics = Vec::new();
        for f in self.registry.gather() {
            let mut text = Vec::new();
            TextEncoder::new().encode(std::slice::from_ref(&f), &mut text)?;
            statics.push((f.name().to_string(), text));
        }
        if self.process {
            statics.extend(process::families());
            statics.sort_by(|a, b| a.0.cmp(&b.0));
        }
        Ok(collector.encode(&statics))
    }
}

/// The HTTP server's connection series (`http::server`). Cheap to clone:
/// every field is a shared counter.
#[derive(Clone)]
pub struct ConnectionMetrics {
    pub open: IntGauge,
    pub refused: IntCounter,
    pub accept_errors: IntCounter,
    /// TLS handshakes that failed (not TLS, a bad or missing client
    /// certificate, a protocol error); a stalled one is a header timeout.
    pub tls_handshake_errors: IntCounter,
    /// Requests refused 401 by the basic-auth gate (`http::auth`).
    pub auth_failures: IntCounter,
    closed: IntCounterVec,
}

impl ConnectionMetrics {
    /// Creates and registers the series. The names are constants, so the
    /// prometheus crate cannot refuse them; if it ever did, the series are
    /// still counted but not exported, and the error is logged.
    pub(crate) fn register(registry: &Registry) -> ConnectionMetrics {
        let m = ConnectionMetrics {
            open: IntGauge::new(
                "bandwatch_http_connections_open",
                "HTTP connections open now.",
            )
            .unwrap_or_else(|e| unregistered(e, |n, h| IntGauge::new(n, h))),
            refused: IntCounter::new(
                "bandwatch_http_connections_refused_total",
                "HTTP connections closed at accept because server.max_connections were open.",
            )
            .unwrap_or_else(|e| unregistered(e, |n, h| IntCounter::new(n, h))),
            accept_errors: IntCounter::new(
                "bandwatch_http_accept_errors_total",
                "Failed accepts of HTTP connections (e.g. no file descriptor left).",
            )
            .unwrap_or_else(|e| unregistered(e, |n, h| IntCounter::new(n, h))),
            tls_handshake_errors: IntCounter::new(
                "bandwatch_http_tls_handshake_errors_total",
                "TLS handshakes on the HTTP port that failed (e.g. plain HTTP, a refused client certificate).",
            )
            .unwrap_or_else(|e| unregistered(e, |n, h| IntCounter::new(n, h))),
            auth_failures: IntCounter::new(
                "bandwatch_http_auth_failures_total",
                "HTTP requests refused 401 for missing or wrong credentials (basic auth or bearer token).",
            )
            .unwrap_or_else(|e| unregistered(e, |n, h| IntCounter::new(n, h))),
            closed: IntCounterVec::new(
                Opts::new(
                    "bandwatch_http_connections_closed_total",
                    "HTTP connections the server closed for a limit, by reason.",
                ),
                &["reason"],
            )
            .unwrap_or_else(|e| {
                unregistered(e, |n, h| IntCounterVec::new(Opts::new(n, h), &["reason"]))
            }),
        };
        for r in CloseReason::ALL {
            m.closed.with_label_values(&[r.as_str()]);
        }
        register(registry, Box::new(m.open.clone()));
        register(registry, Box::new(m.refused.clone()));
        register(registry, Box::new(m.accept_errors.clone()));
        register(registry, Box::new(m.tls_handshake_errors.clone()));
        register(registry, Box::new(m.auth_failures.clone()));
        register(registry, Box::new(m.closed.clone()));
        m
    }

    /// Counts a connection the server closed for `reason`.
    pub fn closed(&self, reason: CloseReason) {
        self.closed.with_label_values(&[reason.as_str()]).inc();
    }

    /// Connections closed for `reason` so far.
    pub fn closed_count(&self, reason: CloseReason) -> u64 {
        self.closed.with_label_values(&[reason.as_str()]).get()
    }
}

/// A metric under a placeholder name after the crate refused the real one
/// (a programming error, logged); a second refusal is impossible for this
/// fixed, valid name.
fn unregistered<T>(e: prometheus::Error, make: impl Fn(&str, &str) -> prometheus::Result<T>) -> T {
    tracing::error!(error = %e, "cannot create an HTTP connection metric");
    match make("bandwatch_unregistered", "placeholder") {
        Ok(m) => m,
        Err(e) => panic!("the prometheus crate refused a fixed valid name: {e}"),
    }
}

fn register(registry: &Registry, c: Box<dyn prometheus::core::Collector>) {
    if let Err(e) = registry.register(c) {
        tracing::error!(error = %e, "cannot register a metrics collector");
    }
}
