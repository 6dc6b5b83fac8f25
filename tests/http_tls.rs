//! TLS and basic auth (`[server] web_config`, README "Serving over the
//! network (TLS, basic auth)") on the real daemon (`bandwatch::serve`,
//! playing config/demo.toml) over real sockets on 127.0.0.1, with a
//! certificate made at test time (rcgen) and a bcrypt hash made at test
//! time (the bcrypt crate), and a real TLS client (tokio-rustls):
//!
//! - right credentials: 200; none, a wrong password, an unknown user: 401
//!   with `WWW-Authenticate: Basic realm="bandwatch"`, counted;
//! - plain HTTP to the TLS port: no HTTP answer, the connection closed,
//!   the handshake error counted, the server still serving;
//! - a client that stalls in the handshake: closed at the header timeout,
//!   counted as such;
//! - the operator's bearer token still reaches the acknowledge endpoint's
//!   alarm worker (and basic credentials alone do not).
//!
//! Every wait is bounded; each daemon is shut down at the end.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod common;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use base64::engine::general_purpose::STANDARD;
use base64::Engine as _;
use rustls::pki_types::pem::PemObject;
use rustls::pki_types::{CertificateDer, ServerName};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use tokio::sync::oneshot;

const USER: &str = "scraper";
const PASSWORD: &str = "correct horse battery staple";

/// A scratch directory, removed on drop.
struct Dir(PathBuf);

impl Dir {
    fn new(tag: &str) -> Dir {
        let p = std::env::temp_dir().join(format!("bandwatch-tls-{tag}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).unwrap();
        Dir(p)
    }
}

impl Drop for Dir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

struct Daemon {
    addr: SocketAddr,
    /// The server's certificate (PEM), the client's only trust anchor.
    ca_pem: String,
    stop: oneshot::Sender<()>,
    task: tokio::task::JoinHandle<()>,
    _dir: Dir,
}

/// A self-signed certificate (rcgen), its key, a bcrypt hash and the
/// web-config file naming them, in `dir`; returns the certificate (PEM).
fn write_tls_files(dir: &Path) -> String {
    let cert =
        rcgen::generate_simple_self_signed(vec!["localhost".to_string(), "127.0.0.1".to_string()])
            .unwrap();
    std::fs::write(dir.join("server.crt"), cert.cert.pem()).unwrap();
    std::fs::write(dir.join("server.key"), cert.signing_key.serialize_pem()).unwrap();
    let hash = bcrypt::hash(PASSWORD, 4).unwrap();
    // Relative cert/key paths: they resolve beside the web-config file.
    std::fs::write(
        dir.join("web.yml"),
        format!(
            "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n\
             basic_auth_users:\n  {USER}: {hash}\n"
        ),
    )
    .unwrap();
    cert.cert.pem()
}

/// The demo config with TLS from the files in `dir`, parsed (and the TLS
/// server config built) afresh.
fn tls_config(dir: &Path, server_extra: &str) -> bandwatch::config::Config {
    let text = demo_text(dir, server_extra);
    let config = match bandwatch::config::parse_str(&text) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}\n{text}"),
    };
    assert!(config.web.as_ref().is_some_and(|w| w.tls.is_some()));
    config
}

/// The demo daemon with TLS and one basic-auth user, storing into a
/// scratch directory; `server_extra` goes into `[server]`.
async fn daemon(tag: &str, server_extra: &str) -> Daemon {
    let dir = Dir::new(tag);
    let ca_pem = write_tls_files(&dir.0);
    let config = tls_config(&dir.0, server_extra);
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let (stop, stop_rx) = oneshot::channel::<()>();
    let task = tokio::spawn(async move {
        let r = bandwatch::serve(config, listener, async move {
            let _ = stop_rx.await;
        })
        .await;
        assert!(r.is_ok(), "daemon: {r:?}");
    });
    Daemon {
        addr,
        ca_pem,
        stop,
        task,
        _dir: dir,
    }
}

/// config/demo.toml storing into `dir`, with the demo token (absolute
/// path) and `web_config` pointing at `dir`/web.yml.
fn demo_text(dir: &Path, server_extra: &str) -> String {
    let token = std::fs::canonicalize("config/demo-token").unwrap();
    std::fs::read_to_string("config/demo.toml")
        .unwrap()
        .replace(
            "listen = \"127.0.0.1:9750\"",
            &format!(
                "listen = \"127.0.0.1:9750\"\nweb_config = {:?}\n{server_extra}",
                dir.join("web.yml").display().to_string()
            ),
        )
        .replace(
            "storage_dir = \"../demo-data\"",
            &format!("storage_dir = {:?}", dir.join("data").display().to_string()),
        )
        .replace(
            "token_file = \"demo-token\"",
            &format!("token_file = {:?}", token.display().to_string()),
        )
}

fn demo_token() -> String {
    std::fs::read_to_string("config/demo-token")
        .unwrap()
        .trim()
        .to_string()
}

async fn stop(d: Daemon) {
    let _ = d.stop.send(());
    tokio::time::timeout(Duration::from_secs(10), d.task)
        .await
        .expect("daemon stops within 10 s")
        .expect("daemon task");
}

fn basic(user: &str, password: &str) -> String {
    format!("Basic {}", STANDARD.encode(format!("{user}:{password}")))
}

/// One request over TLS (trusting only `ca_pem`), `Connection: close`;
/// bounded by 10 s.
async fn tls_request(
    d: &Daemon,
    method: &str,
    path: &str,
    authorization: Option<&str>,
) -> common::Response {
    let run = async {
        let mut roots = rustls::RootCertStore::empty();
        for c in CertificateDer::pem_slice_iter(d.ca_pem.as_bytes()) {
            roots.add(c.unwrap()).unwrap();
        }
        let config = rustls::ClientConfig::builder_with_provider(Arc::new(
            rustls::crypto::ring::default_provider(),
        ))
        .with_safe_default_protocol_versions()
        .unwrap()
        .with_root_certificates(roots)
        .with_no_client_auth();
        let connector = tokio_rustls::TlsConnector::from(Arc::new(config));
        let tcp = TcpStream::connect(d.addr).await.unwrap();
        let mut s = connector
            .connect(ServerName::try_from("localhost").unwrap(), tcp)
            .await
            .expect("TLS handshake");
        let auth = authorization
            .map(|a| format!("Authorization: {a}\r\n"))
            .unwrap_or_default();
        let req = format!(
            "{method} {path} HTTP/1.1\r\nHost: localhost\r\n{auth}Content-Length: 0\r\nConnection: close\r\n\r\n"
        );
        s.write_all(req.as_bytes()).await.unwrap();
        let mut raw = Vec::new();
        // A peer that closes without close_notify ends the read with
        // UnexpectedEof; what was read is the whole response either way.
        if let Err(e) = s.read_to_end(&mut raw).await {
            assert_eq!(e.kind(), std::io::ErrorKind::UnexpectedEof, "{e}");
        }
        common::parse(&raw).unwrap()
    };
    tokio::time::timeout(Duration::from_secs(10), run)
        .await
        .expect("TLS request within 10 s")
}

/// The value of one series in a /metrics body (0 if absent).
fn series(body: &str, name_and_labels: &str) -> f64 {
    body.lines()
        .find_map(|l| l.strip_prefix(name_and_labels)?.trim().parse().ok())
        .unwrap_or(0.0)
}

async fn metrics(d: &Daemon) -> String {
    let r = tls_request(d, "GET", "/metrics", Some(&basic(USER, PASSWORD))).await;
    assert_eq!(r.status, 200);
    r.text()
}

/// Waits until the server closes `s` (EOF or reset); returns the bytes it
/// sent before, or None if it stayed open for `within`.
async fn read_to_close(s: &mut TcpStream, within: Duration) -> Option<Vec<u8>> {
    let start = Instant::now();
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    loop {
        match tokio::time::timeout_at((start + within).into(), s.read(&mut buf)).await {
            Err(_) => return None,
            Ok(Ok(0)) | Ok(Err(_)) => return Some(got),
            Ok(Ok(n)) => got.extend_from_slice(&buf[..n]),
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn only_the_right_credentials_get_in() {
    let d = daemon("creds", "").await;
    let r = tls_request(&d, "GET", "/healthz", Some(&basic(USER, PASSWORD))).await;
    assert_eq!(r.status, 200, "{}", r.text());
    let r = tls_request(&d, "GET", "/api/v1/channels", Some(&basic(USER, PASSWORD))).await;
    assert_eq!(r.status, 200, "{}", r.text());
    for (what, auth) in [
        ("no credentials", None),
        ("a wrong password", Some(basic(USER, "wrong"))),
        ("an unknown user", Some(basic("intruder", PASSWORD))),
        (
            "a wrong bearer token",
            Some("Bearer not-the-operator-token".to_string()),
        ),
    ] {
        let r = tls_request(&d, "GET", "/healthz", auth.as_deref()).await;
        assert_eq!(r.status, 401, "{what}: {}", r.text());
        assert_eq!(
            r.header("www-authenticate"),
            Some("Basic realm=\"bandwatch\""),
            "{what}"
        );
    }
    let m = metrics(&d).await;
    assert_eq!(series(&m, "bandwatch_http_auth_failures_total"), 4.0, "{m}");
    assert_eq!(series(&m, "bandwatch_http_tls_handshake_errors_total"), 0.0);
    stop(d).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn plain_http_to_the_tls_port_is_refused_and_counted() {
    let d = daemon("plain", "").await;
    let mut s = TcpStream::connect(d.addr).await.unwrap();
    s.write_all(b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        .await
        .unwrap();
    let got = read_to_close(&mut s, Duration::from_secs(5))
        .await
        .expect("the server closes a plain-HTTP connection within 5 s");
    assert!(
        !got.starts_with(b"HTTP/"),
        "plain HTTP got an HTTP answer: {:?}",
        String::from_utf8_lossy(&got)
    );
    // The server still serves TLS clients, and counted the failure.
    let m = metrics(&d).await;
    assert_eq!(
        series(&m, "bandwatch_http_tls_handshake_errors_total"),
        1.0,
        "{m}"
    );
    stop(d).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_stalled_handshake_is_closed_at_the_header_timeout() {
    let d = daemon("stall", "header_timeout_s = 0.5").await;
    let mut s = TcpStream::connect(d.addr).await.unwrap();
    // The first bytes of a TLS record header (handshake, TLS 1.0 record
    // version, RFC 8446 §5.1), then nothing.
    s.write_all(&[0x16, 0x03, 0x01]).await.unwrap();
    let start = Instant::now();
    let got = read_to_close(&mut s, Duration::from_secs(5)).await;
    assert!(got.is_some(), "a stalled handshake still open after 5 s");
    assert!(
        start.elapsed() < Duration::from_secs(3),
        "closed after {:?}, want about 0.5 s",
        start.elapsed()
    );
    let m = metrics(&d).await;
    assert_eq!(
        series(
            &m,
            "bandwatch_http_connections_closed_total{reason=\"header_timeout\"}"
        ),
        1.0,
        "{m}"
    );
    assert_eq!(series(&m, "bandwatch_http_tls_handshake_errors_total"), 0.0);
    assert_eq!(
        series(&m, "bandwatch_http_connections_open"),
        1.0,
        "only the scrape"
    );
    stop(d).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_bearer_token_still_reaches_the_write_endpoints() {
    let d = daemon("bearer", "").await;
    let token = format!("Bearer {}", demo_token());
    let ack = "/api/v1/alarms/pump-de/bpfo/ack";
    // Basic credentials pass the gate, but a write wants the token.
    let r = tls_request(&d, "POST", ack, Some(&basic(USER, PASSWORD))).await;
    assert_eq!(r.status, 401, "{}", r.text());
    // The token alone passes the gate and the write.
    let deadline = Instant::now() + Duration::from_secs(30);
    let r = loop {
        let r = tls_request(&d, "POST", ack, Some(&token)).await;
        // 503 until the channel's worker answers commands.
        if r.status != 503 || Instant::now() > deadline {
            break r;
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    };
    // The alarm's own answer (the demo's BPFO is not latched this early):
    // the request went through the gate and the token check to the
    // channel's alarm worker.
    assert_eq!(r.status, 409, "{}", r.text());
    assert!(r.text().contains("not latched"), "{}", r.text());
    // And reads with it too.
    let r = tls_request(&d, "GET", "/api/v1/alarms", Some(&token)).await;
    assert_eq!(r.status, 200, "{}", r.text());
    stop(d).await;
}

/// A reload of the same file with TLS on: the web config read again (a new
/// rustls server config, with its own session cache and ticket keys) is
/// the same settings, so the reload applies and nothing needs a restart
/// (README "Reloading the config").
#[tokio::test]
async fn an_unchanged_tls_config_reloads() {
    let dir = Dir::new("tls-reload");
    write_tls_files(&dir.0);
    let mut p = bandwatch::pipeline::Pipeline::start(&tls_config(&dir.0, "")).expect("pipeline");
    let r = p.reload(&tls_config(&dir.0, "")).await;
    p.stop().await;
    assert!(r.is_ok(), "an unchanged TLS config was refused: {r:?}");
}
