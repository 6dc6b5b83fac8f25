//! The daemon: the pipeline and its HTTP server, run until shut down;
//! `notify` speaks systemd's notify protocol, `logs` sets up the log
//! output (text or JSON lines).

pub mod logs;
pub mod notify;

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;

use tokio::net::TcpListener;

use crate::config::web::WebConfig;
use crate::config::{Config, HttpLimits};
use crate::http;
use crate::pipeline::reload::{ConfigLoader, Problem, ReloadError, ReloadRequest};
use crate::pipeline::{Pipeline, RunError};

/// Runs the daemon on an already bound listener until `shutdown` resolves,
/// then drains HTTP, stops sources and workers. Under systemd
/// (`NOTIFY_SOCKET`), `READY=1` goes out once the sources are spawned (the
/// listener is bound already), then status and watchdog messages, and
/// `STOPPING=1` when `shutdown` resolves (see [`notify`]).
pub async fn serve<F>(config: Config, listener: TcpListener, shutdown: F) -> Result<(), RunError>
where
    F: Future<Output = ()> + Send + 'static,
{
    serve_with(config, listener, shutdown, None).await
}

/// As [`serve`], with the config re-reader: SIGHUP and `POST
/// /api/v1/reload` then reload the config (README "Reloading the
/// config"); without it, both are refused (SIGHUP is ignored with a
/// warning).
pub async fn serve_with<F>(
    config: Config,
    listener: TcpListener,
    shutdown: F,
    loader: Option<ConfigLoader>,
) -> Result<(), RunError>
where
    F: Future<Output = ()> + Send + 'static,
{
    let limits = fit_to_open_file_limit(config.http, config.sources.len());
    if let Ok(addr) = listener.local_addr() {
        warn_if_open(addr, config.web.as_ref());
    }
    let pipeline = Pipeline::start(&config)?;
    let (reload_tx, reload_rx) = tokio::sync::mpsc::channel::<ReloadRequest>(4);
    let hangups = tokio::spawn(forward_hangups(reload_tx.clone()));
    let (mut app, connections) =
        http::app_live(pipeline.live.clone(), loader.is_some().then_some(reload_tx));
    let web = config.web.as_ref();
    if let Some(w) = web.filter(|w| !w.users.is_empty()) {
        let auth = http::auth::BasicAuth::new(
            w.users.clone(),
            pipeline.state.token.clone(),
            connections.auth_failures.clone(),
        );
        app = http::auth::require(app, Arc::new(auth));
    }
    let tls = web.and_then(|w| w.tls.as_ref()).map(|t| t.server.clone());
    let notifier = notify::Notifier::from_env();
    // The workers outlive reloads (channels are moved between them by
    // commands), so their heartbeats are taken once; the status reads the
    // state as a reload left it.
    let monitor = notify::start(notifier, pipeline.live.clone(), pipeline.heartbeats());
    let shutdown = async move {
        shutdown.await;
        notifier.stopping();
    };
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel();
    let reloader = tokio::spawn(reload_loop(pipeline, reload_rx, stop_rx, loader));
    let result = http::server::serve(listener, app, limits, connections, tls, shutdown)
        .await
        .map_err(RunError::Http);
    if let Some(m) = monitor {
        m.abort();
    }
    hangups.abort();
    let _ = hangups.await;
    // A reload under way finishes first; then the loop hands the pipeline
    // back.
    let _ = stop_tx.send(());
    match reloader.await {
        Ok(pipeline) => pipeline.stop().await,
        Err(e) => tracing::error!(error = %e, "the reload task failed"),
    }
    result
}

/// Turns each SIGHUP into a reload request. Installing the handler also
/// keeps SIGHUP from ending the process (its default action).
async fn forward_hangups(tx: tokio::sync::mpsc::Sender<ReloadRequest>) {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        let mut hup = match signal(SignalKind::hangup()) {
            Ok(s) => s,
            Err(e) => {
                tracing::warn!(error = %e, "cannot listen for SIGHUP: reload by POST /api/v1/reload only");
                return;
            }
        };
        while hup.recv().await.is_some() {
            let req = ReloadRequest {
                origin: "SIGHUP",
                reply: None,
            };
            if tx.send(req).await.is_err() {
                return;
            }
        }
    }
    #[cfg(not(unix))]
    drop(tx);
}

/// Owns the pipeline while the daemon runs: one reload at a time, in the
/// order asked. Returns the pipeline when told to stop (or every sender
/// is gone).
async fn reload_loop(
    mut pipeline: Pipeline,
    mut rx: tokio::sync::mpsc::Receiver<ReloadRequest>,
    mut stop: tokio::sync::oneshot::Receiver<()>,
    loader: Option<ConfigLoader>,
) -> Pipeline {
    loop {
        let req = tokio::select! {
            _ = &mut stop => break,
            r = rx.recv() => match r {
                Some(r) => r,
                None => break,
            },
        };
        let result = match &loader {
            None => {
                tracing::warn!(
                    origin = req.origin,
                    "reload asked, but this daemon has no config file to re-read; ignored"
                );
                Err(ReloadError::Refused(vec![Problem {
                    path: "config".into(),
                    message: "this daemon was started without a config file to re-read".into(),
                }]))
            }
            Some(load) => {
                tracing::info!(origin = req.origin, "reloading the config");
                let load = load.clone();
                match tokio::task::spawn_blocking(move || load()).await {
                    Ok(Ok(cfg)) => pipeline.reload(&cfg).await,
                    Ok(Err(e)) => {
                        let err = ReloadError::from_config(&e);
                        pipeline.refused(&err);
                        Err(err)
                    }
                    Err(e) => {
                        let err = ReloadError::Refused(vec![Problem {
                            path: "config".into(),
                            message: format!("the config reader failed: {e}"),
                        }]);
                        pipeline.refused(&err);
                        Err(err)
                    }
                }
            }
        };
        if let Some(reply) = req.reply {
            let _ = reply.send(result);
        }
    }
    pipeline
}

/// Logs a warning when `addr` is reachable from other hosts (not loopback)
/// and TLS or basic auth is off (README, "Serving over the network").
pub fn warn_if_open(addr: SocketAddr, web: Option<&WebConfig>) {
    if let Some((tls, auth)) = exposed(addr, web) {
        tracing::warn!(
            %addr,
            tls,
            basic_auth = auth,
            "HTTP listens on a non-loopback address without TLS and basic auth: anyone on \
             the network can read (and, with the token, act on) this daemon; set \
             [server] web_config (README, \"Serving over the network\")"
        );
    }
}

/// `Some((tls on, basic auth on))` when `addr` is not loopback and either
/// is off: the case [`warn_if_open`] warns about.
pub fn exposed(addr: SocketAddr, web: Option<&WebConfig>) -> Option<(bool, bool)> {
    let tls = web.is_some_and(|w| w.tls.is_some());
    let auth = web.is_some_and(|w| !w.users.is_empty());
    let safe = addr.ip().is_loopback() || (tls && auth);
    (!safe).then_some((tls, auth))
}

/// File descriptors kept out of the HTTP server's reach, for the journal,
/// captures and baselines (a write opens a temporary file, the file and its
/// directory), the sources' sockets, logs and the runtime (README, "Limits
/// of the HTTP server").
pub const FD_RESERVE: u64 = 128;

/// Raises the soft open-file limit to the hard limit, then lowers the HTTP
/// connection cap if it would not leave [`FD_RESERVE`] descriptors (plus
/// one per source) free, with a warning. A failure to raise is logged, and
/// the cap fitted to the limit as it is.
pub fn fit_to_open_file_limit(mut limits: HttpLimits, sources: usize) -> HttpLimits {
    let soft = match rlimit::increase_nofile_limit(u64::MAX) {
        Ok(n) => n,
        Err(e) => {
            tracing::warn!(error = %e, "cannot raise the open-file limit");
            match rlimit::getrlimit(rlimit::Resource::NOFILE) {
                Ok((soft, _)) => soft,
                Err(_) => return limits,
            }
        }
    };
    let reserve = FD_RESERVE + sources as u64;
    let room = soft.saturating_sub(reserve).max(1);
    if (limits.max_connections as u64) > room {
        tracing::warn!(
            max_connections = limits.max_connections,
            open_file_limit = soft,
            reserve,
            using = room,
            "server.max_connections does not fit the open-file limit; lowered"
        );
        limits.max_connections = room as usize;
    } else {
        tracing::debug!(open_file_limit = soft, "open-file limit");
    }
    limits
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn warns_only_off_loopback_without_both() {
        let users = std::collections::BTreeMap::from([("u".to_string(), "h".to_string())]);
        let auth_only = WebConfig {
            path: "web.yml".into(),
            tls: None,
            users,
        };
        let lan: SocketAddr = "192.0.2.10:9750".parse().expect("addr");
        let any: SocketAddr = "0.0.0.0:9750".parse().expect("addr");
        let v6: SocketAddr = "[::1]:9750".parse().expect("addr");
        let lo: SocketAddr = "127.0.0.1:9750".parse().expect("addr");
        assert_eq!(exposed(lan, None), Some((false, false)));
        assert_eq!(exposed(any, None), Some((false, false)));
        assert_eq!(exposed(any, Some(&auth_only)), Some((false, true)));
        assert_eq!(exposed(lo, None), None);
        assert_eq!(exposed(v6, None), None);
    }
}
