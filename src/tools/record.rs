//! `bandwatch record`: stores a raw stream exactly as received, for replay
//! or for a bug report. UDP datagrams are written back to back (each is a
//! whole BWF1 frame, so the file is a valid BWF1 stream).

use std::path::Path;
use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream, UdpSocket};
use tokio_serial::SerialPortBuilderExt;

use crate::tools::Endpoint;

#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize)]
pub struct RecordReport {
    pub bytes: u64,
    /// Reads (stream) or datagrams (UDP).
    pub reads: u64,
}

#[derive(Debug, thiserror::Error)]
pub enum RecordError {
    #[error("cannot open {what}: {source}")]
    Open {
        what: String,
        #[source]
        source: std::io::Error,
    },
    #[error("reading {what} failed: {source}")]
    Read {
        what: String,
        #[source]
        source: std::io::Error,
    },
    #[error("writing {path} failed: {source}")]
    Write {
        path: String,
        #[source]
        source: std::io::Error,
    },
}

enum Input {
    Stream(Box<dyn tokio::io::AsyncRead + Unpin + Send>),
    Udp(UdpSocket),
}

/// Records from `from` into `out` until `seconds` pass, the peer closes, or
/// `stop` resolves.
pub async fn record<F>(
    from: &Endpoint,
    out: &Path,
    seconds: Option<f64>,
    stop: F,
) -> Result<RecordReport, RecordError>
where
    F: std::future::Future<Output = ()>,
{
    let what = format!("{from:?}");
    let open_err = |source| RecordError::Open {
        what: what.clone(),
        source,
    };
    let mut input = match from {
        Endpoint::Tcp(a) => Input::Stream(Box::new(
            TcpStream::connect(a.as_str()).await.map_err(open_err)?,
        )),
        Endpoint::TcpServe(a) => {
            let l = TcpListener::bind(a.as_str()).await.map_err(open_err)?;
            let (s, _) = l.accept().await.map_err(open_err)?;
            Input::Stream(Box::new(s))
        }
        Endpoint::Udp(a) => Input::Udp(UdpSocket::bind(a.as_str()).await.map_err(open_err)?),
        Endpoint::Serial(p) => Input::Stream(Box::new(
            tokio_serial::new(p.as_str(), 115_200)
                .open_native_async()
                .map_err(|e| open_err(std::io::Error::other(e.to_string())))?,
        )),
    };
    let path = out.display().to_string();
    let write_err = |source| RecordError::Write {
        path: path.clone(),
        source,
    };
    let mut file = tokio::fs::File::create(out).await.map_err(write_err)?;
    let mut report = RecordReport::default();
    let mut buf = vec![0u8; 65_536];
    let deadline = seconds.map(|s| tokio::time::Instant::now() + Duration::from_secs_f64(s));
    let until = async move {
        match deadline {
            Some(d) => tokio::time::sleep_until(d).await,
            None => std::future::pending().await,
        }
    };
    tokio::pin!(until);
    tokio::pin!(stop);
    loop {
        let n = match &mut input {
            Input::Stream(s) => tokio::select! {
                r = s.read(&mut buf) => r,
                _ = &mut until => break,
                _ = &mut stop => break,
            },
            Input::Udp(s) => tokio::select! {
                r = s.recv(&mut buf) => r,
                _ = &mut until => break,
                _ = &mut stop => break,
            },
        }
        .map_err(|source| RecordError::Read {
            what: what.clone(),
            source,
        })?;
        if n == 0 {
            break;
        }
        file.write_all(&buf[..n]).await.map_err(write_err)?;
        report.bytes += n as u64;
        report.reads += 1;
    }
    file.flush().await.map_err(write_err)?;
    file.sync_all().await.map_err(write_err)?;
    Ok(report)
}
