//! The daemon: the pipeline and its HTTP server, run until shut down.

use std::future::Future;

use tokio::net::TcpListener;

use crate::config::Config;
use crate::http;
use crate::pipeline::{Pipeline, RunError};

/// Runs the daemon on an already bound listener until `shutdown` resolves,
/// then drains HTTP, stops sources and workers.
pub async fn serve<F>(config: Config, listener: TcpListener, shutdown: F) -> Result<(), RunError>
where
    F: Future<Output = ()> + Send + 'static,
{
    let pipeline = Pipeline::start(&config)?;
    let app = http::router(pipeline.state.clone());
    let result = axum::serve(listener, app)
        .with_graceful_shutdown(shutdown)
        .await
        .map_err(RunError::Http);
    pipeline.stop().await;
    result
}
