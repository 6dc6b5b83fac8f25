//! The `exposition` phase (`bench --only exposition`): what `/metrics`
//! costs at 64, 1024 and 4096 channels (`--exposition-channels`), in full
//! and under the two trims README "Trimming /metrics" gives, side by side
//! on the same published state (the http phase's rig: five bands with an
//! alert and a danger alarm on every channel, every channel published):
//!
//! - `render`: one uncached render (`Metrics::render_fresh`, the http
//!   phase's `render_probe`), ms;
//! - `body` and `gzip body`: the plain body, and the body the real router
//!   sends when asked for gzip (tower-http's compression layer), bytes;
//! - `gzip`: one gzip request served from the render cache (a plain
//!   request renders first), i.e. compression and routing alone, ms.

use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::http::{header, Request};
use tower::ServiceExt as _;

use super::http::{http_config_of, http_setup, render_probe};
use super::{BenchArgs, BenchError, Row, Summary};
use crate::config::exposition::{BandExport, ExpositionSpec, FamilyPattern};
use crate::pipeline::state::AppState;

/// README "Trimming /metrics", `lean`: families that neither the shipped
/// alert rules nor the dashboard read (a unit test holds both to this).
pub const LEAN_EXCLUDE: [&str; 6] = [
    "bandwatch_alarm_state_since_timestamp_seconds",
    "bandwatch_band_peak_frequency_hertz",
    "bandwatch_channel_blocks_total",
    "bandwatch_channel_last_spectrum_timestamp_seconds",
    "bandwatch_channel_mean_*",
    "bandwatch_channel_peak_to_peak_*",
];

/// README "Trimming /metrics", `minimal`: `lean` and five more; the
/// rule BandwatchAlarmChatter, the dashboard's limit lines and its
/// discontinuity panel go with them.
pub const MINIMAL_EXTRA: [&str; 5] = [
    "bandwatch_alarm_limit",
    "bandwatch_alarm_limit_*",
    "bandwatch_alarm_transitions_total",
    "bandwatch_channel_discontinuities_total",
    "bandwatch_channel_samples_processed_total",
];

/// The trims measured: name and `[metrics]`.
fn profiles() -> Vec<(&'static str, ExpositionSpec)> {
    let spec = |entries: &[&str]| ExpositionSpec {
        exclude: entries
            .iter()
            .map(|e| match e.strip_suffix('*') {
                Some(t) => FamilyPattern {
                    text: t.into(),
                    prefix: true,
                },
                None => FamilyPattern {
                    text: (*e).into(),
                    prefix: false,
                },
            })
            .collect(),
        bands: BandExport::Alarmed,
    };
    let minimal: Vec<&str> = LEAN_EXCLUDE.iter().chain(&MINIMAL_EXTRA).copied().collect();
    vec![
        ("full", ExpositionSpec::default()),
        ("lean", spec(&LEAN_EXCLUDE)),
        ("minimal", spec(&minimal)),
    ]
}

/// One GET /metrics through `router`, gzip asked for or not: (ms, body
/// bytes as sent, content-encoding).
async fn get_metrics(
    router: &axum::Router,
    gzip: bool,
) -> Result<(f64, usize, Option<String>), BenchError> {
    let mut req = Request::get("/metrics");
    if gzip {
        req = req.header(header::ACCEPT_ENCODING, "gzip");
    }
    let req = req
        .body(axum::body::Body::empty())
        .map_err(|e| BenchError::Lost(format!("GET /metrics request: {e}")))?;
    let t = Instant::now();
    let resp = router
        .clone()
        .oneshot(req)
        .await
        .map_err(|e| BenchError::Lost(format!("GET /metrics: {e}")))?;
    let status = resp.status();
    let encoding = resp
        .headers()
        .get(header::CONTENT_ENCODING)
        .and_then(|v| v.to_str().ok())
        .map(str::to_string);
    let body = axum::body::to_bytes(resp.into_body(), usize::MAX)
        .await
        .map_err(|e| BenchError::Lost(format!("GET /metrics body: {e}")))?;
    let ms = t.elapsed().as_secs_f64() * 1e3;
    if !status.is_success() {
        return Err(BenchError::Lost(format!("GET /metrics: {status}")));
    }
    Ok((ms, body.len(), encoding))
}

pub(crate) fn exposition_phase(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    let repeats = args.repeats.max(1);
    let min = Duration::from_secs_f64(args.work_seconds);
    let row = |case: String, unit: &str, v: &[f64]| Row {
        phase: "exposition".into(),
        case,
        unit: unit.into(),
        value: Summary::of(v),
        ratio: None,
        target: None,
    };
    for &channels in &args.exposition_channels {
        eprintln!("bench: exposition setting up {channels} channels");
        let setup = http_setup(channels, args.n, signal)?;
        let base = &setup.state;
        for (name, spec) in profiles() {
            // The same channels, sources and alarm I/O under another
            // `[metrics]`.
            let mut config = http_config_of(channels, args.n)?;
            config.exposition = spec;
            let mut app = AppState::with_channels(&config, base.channels.clone());
            app.sources = base.sources.clone();
            app.machines = base.machines.clone();
            app.alarm_io = base.alarm_io.clone();
            let app = Arc::new(app);
            let router = crate::http::router(app.clone());
            let (mut render, mut bytes, mut lines, mut gz_bytes, mut gz_ms) =
                (vec![], vec![], vec![], vec![], vec![]);
            for _ in 0..repeats {
                let (ms, b, l) = render_probe(&app, min)?;
                render.push(ms);
                bytes.push(b as f64);
                lines.push(l as f64);
                let (ms, n, enc) = rt.block_on(async {
                    // The plain request renders and caches; the gzip one
                    // right after is served from that cache.
                    get_metrics(&router, false).await?;
                    get_metrics(&router, true).await
                })?;
                if enc.as_deref() != Some("gzip") {
                    return Err(BenchError::Lost(format!(
                        "GET /metrics with Accept-Encoding: gzip came back as {enc:?}"
                    )));
                }
                gz_bytes.push(n as f64);
                gz_ms.push(ms);
            }
            let tag = format!("{channels} ch {name}");
            rows.push(row(format!("render {tag}"), "ms", &render));
            rows.push(row(format!("body {tag}"), "bytes", &bytes));
            rows.push(row(format!("body {tag}"), "lines", &lines));
            rows.push(row(format!("gzip body {tag}"), "bytes", &gz_bytes));
            rows.push(row(format!("gzip {tag} (cached body)"), "ms", &gz_ms));
        }
    }
    notes.push(format!(
        "exposition: /metrics of the http phase's channels (5 bands, each with an alert and a danger alarm); full = no [metrics]; lean = exclude {:?}, bands = \"alarmed\"; minimal = lean + {:?}; render = one uncached render; gzip = tower-http's layer on the real router, the request served from the render cache",
        LEAN_EXCLUDE, MINIMAL_EXTRA
    ));
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn read(rel: &str) -> String {
        let p = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join(rel);
        std::fs::read_to_string(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
    }

    /// The `lean` trim leaves out nothing the shipped alert rules or the
    /// dashboard read: no entry's name (or prefix) appears in them. The
    /// `minimal` extras each do appear (or the README would say wrongly
    /// what they cost).
    #[test]
    fn lean_keeps_what_rules_and_dashboard_read() {
        let shipped = [
            read("deploy/prometheus-rules.yml"),
            read("deploy/scale-out/central-rules.yml"),
            read("deploy/grafana/bandwatch.json"),
        ]
        .concat();
        for e in LEAN_EXCLUDE {
            let text = e.trim_end_matches('*');
            assert!(
                !shipped.contains(text),
                "{e} is read by a shipped rule or panel"
            );
        }
        for e in MINIMAL_EXTRA {
            // The dashboard reads the limits by one regex,
            // `bandwatch_alarm_limit(_.+)?`: the stem without the `_`.
            let text = e.trim_end_matches('*').trim_end_matches('_');
            assert!(shipped.contains(text), "{e} is read by nothing shipped");
        }
    }

    /// README "Trimming /metrics" lists the two trims as measured here.
    #[test]
    fn readme_gives_the_measured_trims() {
        let readme = read("README.md");
        let toml = |entries: &[&str]| {
            entries
                .iter()
                .map(|e| format!("    \"{e}\",\n"))
                .collect::<String>()
        };
        let lean = format!(
            "exclude = [\n{}]\nbands = \"alarmed\"\n",
            toml(&LEAN_EXCLUDE)
        );
        assert!(readme.contains(&lean), "README lacks:\n{lean}");
        assert!(
            readme.contains(&toml(&MINIMAL_EXTRA)),
            "README lacks the minimal extras:\n{}",
            toml(&MINIMAL_EXTRA)
        );
    }

    /// Each profile is a valid `[metrics]` for the bench's channels.
    #[test]
    fn profiles_pass_the_config_check() {
        let mut config = http_config_of(4, 1024).expect("config");
        for (name, spec) in profiles() {
            config.exposition = spec;
            let issues = crate::http::metrics::check_exposition(&config);
            assert!(issues.is_empty(), "{name}: {issues:?}");
        }
    }
}
