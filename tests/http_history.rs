//! The history endpoints on the real daemon (`bandwatch::serve` on
//! 127.0.0.1:0) playing the demo (pump train P2) with `[history]` writing
//! a temp file: spectra stored on request over HTTP, read back over HTTP,
//! and checked against the file itself, opened with SQLite and decoded
//! with the codec (the BLOB is the outside truth here): a stored
//! spectrum's values are the stored lines scaled as the live endpoint
//! scales them (√P for rms, P for power: `http::scaling`'s table), and a
//! waterfall's values are stored lines, bit for bit.

mod common;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use serde_json::Value;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::sync::oneshot;

use common::{get, try_get};

const READY_TIMEOUT: Duration = Duration::from_secs(20);

fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("bandwatch-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

/// The demo config at 4× real time, storing into `dir`, aggregates every
/// second.
fn config(dir: &Path) -> bandwatch::config::Config {
    let token = std::fs::canonicalize("config/demo-token").expect("demo token");
    let text = std::fs::read_to_string("config/demo.toml")
        .expect("demo config")
        .replacen("seed = 2\n", "seed = 2\nspeed = 4.0\n", 1)
        .replace(
            "storage_dir = \"../demo-data\"",
            &format!("storage_dir = {:?}", dir.display().to_string()),
        )
        .replace(
            "token_file = \"demo-token\"",
            &format!("token_file = {:?}", token.display().to_string()),
        );
    assert!(
        text.contains("[history]\ninterval_s = 1\n"),
        "demo [history] changed"
    );
    match bandwatch::config::parse_str(&text) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    }
}

fn token() -> String {
    std::fs::read_to_string("config/demo-token")
        .expect("token")
        .trim()
        .to_string()
}

/// `POST path` with the bearer token; (status, JSON body).
async fn post(addr: SocketAddr, path: &str, token: &str) -> (u16, Value) {
    let run = async {
        let mut s = tokio::net::TcpStream::connect(addr).await.expect("connect");
        let req = format!(
            "POST {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\
             Authorization: Bearer {token}\r\nContent-Length: 0\r\n\r\n"
        );
        s.write_all(req.as_bytes()).await.expect("write");
        let mut raw = Vec::new();
        s.read_to_end(&mut raw).await.expect("read");
        let r = common::parse(&raw).expect("reply");
        (r.status, r.json())
    };
    tokio::time::timeout(common::REQUEST_TIMEOUT, run)
        .await
        .expect("reply in time")
}

async fn wait_ready(addr: SocketAddr) {
    let start = Instant::now();
    loop {
        if let Ok(r) = try_get(addr, "/readyz").await {
            if r.status == 200 {
                return;
            }
        }
        assert!(start.elapsed() < READY_TIMEOUT, "not ready in time");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

fn f32s(v: &Value) -> Vec<f32> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number") as f32)
        .collect()
}

/// The stored power lines of spectrum `id`, read from the file.
fn stored_power(file: &Path, id: i64) -> Vec<f32> {
    let conn =
        rusqlite::Connection::open_with_flags(file, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .expect("open the history file");
    let blob: Vec<u8> = conn
        .query_row("SELECT power FROM spectra WHERE id = ?1", [id], |r| {
            r.get(0)
        })
        .expect("the row");
    bandwatch::history::codec::decode(&blob).expect("decodes")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn stored_spectra_read_back_as_stored() {
    let dir = temp_dir("http-history");
    let file = dir.join("history.sqlite");
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let (stop_tx, stop_rx) = oneshot::channel::<()>();
    let server = tokio::spawn(bandwatch::serve(config(&dir), listener, async move {
        let _ = stop_rx.await;
    }));
    wait_ready(addr).await;
    let token = token();

    let (status, body) = post(
        addr,
        "/api/v1/history/channels/pump-de/spectra",
        "wrong-token-000000",
    )
    .await;
    assert_eq!(status, 401, "{body}");
    let mut ids = Vec::new();
    for _ in 0..2 {
        let (status, body) = post(addr, "/api/v1/history/channels/pump-de/spectra", &token).await;
        assert_eq!(status, 201, "{body}");
        ids.push(body["id"].as_i64().expect("id"));
        tokio::time::sleep(Duration::from_millis(600)).await;
    }

    for &id in &ids {
        let stored = stored_power(&file, id);
        assert_eq!(stored.len(), 4097, "block 8192: 4097 lines");
        let r = get(addr, &format!("/api/v1/history/spectra/{id}?scaling=power")).await;
        assert_eq!(r.status, 200, "{}", r.text());
        let j = r.json();
        assert_eq!(j["stored"]["id"], id);
        assert_eq!(j["stored"]["reason"], "request");
        assert_eq!(j["channel"], "pump-de");
        assert_eq!(f32s(&j["values"]), stored);
        // rms: √P of each stored line (computed here in f64, as the
        // scaling table says), the same as the live endpoint's scaling.
        let j = get(addr, &format!("/api/v1/history/spectra/{id}"))
            .await
            .json();
        let want: Vec<f32> = stored
            .iter()
            .map(|&p| f64::from(p.max(0.0)).sqrt() as f32)
            .collect();
        assert_eq!(f32s(&j["values"]), want);
        assert_eq!(j["scaling"], "rms");
    }

    // The waterfall (`to` far ahead: the demo plays 4× real time, so its
    // frames' times run ahead of the wall clock): every line its own
    // column, the stored lines exactly.
    let r = get(addr, "/api/v1/history/channels/pump-de/waterfall?from=-1h&to=2100-01-01T00:00:00Z&scaling=power&columns=8192").await;
    assert_eq!(r.status, 200, "{}", r.text());
    let w = r.json();
    let row_ids: Vec<i64> = w["ids"]
        .as_array()
        .expect("ids")
        .iter()
        .map(|v| v.as_i64().expect("id"))
        .collect();
    assert!(
        ids.iter().all(|id| row_ids.contains(id)),
        "{row_ids:?} lacks {ids:?}"
    );
    for (k, id) in row_ids.iter().enumerate() {
        let got = f32s(&w["values"][k]);
        let stored = stored_power(&file, *id);
        assert_eq!(
            got.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
            stored.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
            "row {k} (spectrum {id})"
        );
    }
    // 100 columns from 10 to 500 Hz: each value is the largest stored
    // line of its column.
    let w = get(addr, "/api/v1/history/channels/pump-de/waterfall?from=-1h&to=2100-01-01T00:00:00Z&scaling=power&columns=100&fmin=10&fmax=500").await.json();
    let df = w["df_hz"].as_f64().expect("df");
    let lo: Vec<f64> = w["f_lo_hz"]
        .as_array()
        .expect("lo")
        .iter()
        .map(|v| v.as_f64().expect("f"))
        .collect();
    let hi: Vec<f64> = w["f_hi_hz"]
        .as_array()
        .expect("hi")
        .iter()
        .map(|v| v.as_f64().expect("f"))
        .collect();
    assert_eq!(lo.len(), 100);
    for (k, id) in w["ids"].as_array().expect("ids").iter().enumerate() {
        let stored = stored_power(&file, id.as_i64().expect("id"));
        let got = f32s(&w["values"][k]);
        for c in 0..lo.len() {
            let (a, b) = ((lo[c] / df).round() as usize, (hi[c] / df).round() as usize);
            let want = stored[a..=b].iter().fold(f32::MIN, |m, &x| m.max(x));
            assert_eq!(got[c].to_bits(), want.to_bits(), "row {k} column {c}");
        }
    }

    // The aggregates arrive once a second: the overall RMS has rows.
    let start = Instant::now();
    loop {
        let r = get(addr, "/api/v1/history/channels/pump-de/trend?series=overall-rms&from=-1h&to=2100-01-01T00:00:00Z").await;
        if r.status == 200 && r.json()["stored_rows"].as_u64().unwrap_or(0) >= 2 {
            let j = r.json();
            assert_eq!(j["unit"], "g");
            assert!(j["max"][0].as_f64().expect("max") >= j["min"][0].as_f64().expect("min"));
            break;
        }
        assert!(
            start.elapsed() < Duration::from_secs(20),
            "no aggregates: {}",
            r.text()
        );
        tokio::time::sleep(Duration::from_millis(250)).await;
    }

    let _ = stop_tx.send(());
    let done = tokio::time::timeout(Duration::from_secs(20), server).await;
    assert!(matches!(done, Ok(Ok(Ok(())))), "clean stop: {done:?}");
    let _ = std::fs::remove_dir_all(&dir);
}
