//! Log output of the real binary: `--log-format json` writes one JSON
//! object per line with fields as JSON values (numbers, absent options,
//! objects), never Rust debug text; text logs into a pipe carry no ANSI
//! escape. Events are driven over 127.0.0.1: a bad datagram, a TCP peer
//! that connects and leaves, startup lines, and a replay with rejections.

mod common;

use std::io::Write;
use std::net::{TcpStream, UdpSocket};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use serde_json::Value;

fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("bw-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

struct Daemon(Child);

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

const CONFIG: &str = r#"
[server]
listen = "127.0.0.1:0"

[[source]]
name = "udp"
kind = "udp"
listen = "127.0.0.1:0"
channels = 1
sample_rate_hz = 1000

[[source]]
name = "box"
kind = "tcp-listen"
listen = "127.0.0.1:0"
channels = 1
sample_rate_hz = 1000

[[channel]]
name = "u"
source = "udp"
index = 0
unit = "g"
block = 256

[[channel]]
name = "t"
source = "box"
index = 0
unit = "g"
block = 256
"#;

fn start(dir: &Path, format: &str, env: &[(&str, &str)]) -> (Daemon, mpsc::Receiver<String>) {
    let cfg = dir.join("logs.toml");
    std::fs::write(&cfg, CONFIG).expect("config");
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_bandwatch"));
    cmd.args(["--log-format", format, "run", "--config"])
        .arg(&cfg)
        .env("RUST_LOG", "info")
        .env_remove("NO_COLOR")
        .env_remove("NOTIFY_SOCKET")
        .stdout(Stdio::null());
    for (k, v) in env {
        cmd.env(k, v);
    }
    let (child, rx) = common::spawn_with_stderr_lines(&mut cmd);
    (Daemon(child), rx)
}

/// Lines until one satisfies `done` (at most `secs`).
fn read_until(
    rx: &mpsc::Receiver<String>,
    secs: u64,
    mut done: impl FnMut(&str) -> bool,
) -> Vec<String> {
    let deadline = Instant::now() + Duration::from_secs(secs);
    let mut out = Vec::new();
    while let Ok(l) = rx.recv_timeout(deadline.saturating_duration_since(Instant::now())) {
        let stop = done(&l);
        out.push(l);
        if stop {
            break;
        }
    }
    out
}

fn stop(d: &mut Daemon, rx: &mpsc::Receiver<String>) -> Vec<String> {
    let ok = Command::new("kill")
        .args(["-TERM", &d.0.id().to_string()])
        .status()
        .expect("kill");
    assert!(ok.success());
    let mut rest = read_until(rx, 10, |_| false);
    let code = d.0.wait().expect("wait").code();
    assert_eq!(code, Some(0), "{rest:#?}");
    rest.retain(|l| !l.is_empty());
    rest
}

/// No value anywhere in `v` is Rust debug text.
fn no_debug_text(v: &Value, line: &str) {
    match v {
        Value::String(s) => assert!(
            !(s == "None" || s.starts_with("Some(") || s.contains("[(\"") || s.contains("{\"")),
            "debug text {s:?} in {line}"
        ),
        Value::Array(a) => a.iter().for_each(|x| no_debug_text(x, line)),
        Value::Object(o) => o.values().for_each(|x| no_debug_text(x, line)),
        _ => {}
    }
}

fn parse_all(lines: &[String]) -> Vec<Value> {
    lines
        .iter()
        .map(|l| {
            let v: Value =
                serde_json::from_str(l).unwrap_or_else(|e| panic!("not JSON ({e}): {l}"));
            assert!(v.is_object(), "{l}");
            for k in ["timestamp", "level", "target", "message"] {
                assert!(v[k].is_string(), "no {k} in {l}");
            }
            no_debug_text(&v, l);
            v
        })
        .collect()
}

fn find<'a>(events: &'a [Value], message: &str) -> &'a Value {
    events
        .iter()
        .find(|e| e["message"].as_str().is_some_and(|m| m.contains(message)))
        .unwrap_or_else(|| panic!("no {message:?} event in {events:#?}"))
}

fn addr_of(v: &Value) -> std::net::SocketAddr {
    v["addr"]
        .as_str()
        .and_then(|a| a.parse().ok())
        .unwrap_or_else(|| panic!("no addr in {v}"))
}

#[test]
fn json_logs_are_json_values_one_event_per_line() {
    let dir = temp_dir("logs-json");
    let (mut d, rx) = start(&dir, "json", &[]);
    let mut udp_addr = None;
    let mut tcp_addr = None;
    let mut lines = read_until(&rx, 30, |l| {
        let v: Value = serde_json::from_str(l).unwrap_or(Value::Null);
        let m = v["message"].as_str().unwrap_or("");
        if m.contains("receiving BWF1 datagrams") {
            udp_addr = Some(addr_of(&v));
        }
        if m.contains("listening for a DAQ connection") {
            tcp_addr = Some(addr_of(&v));
        }
        udp_addr.is_some() && tcp_addr.is_some()
    });
    let (udp_addr, tcp_addr) = (udp_addr.expect("udp addr"), tcp_addr.expect("tcp addr"));
    // A datagram that is no BWF1 frame: rejected, counted and logged.
    let s = UdpSocket::bind("127.0.0.1:0").expect("udp");
    s.send_to(b"not a frame at all", udp_addr).expect("send");
    lines.extend(read_until(&rx, 10, |l| l.contains("rejected")));
    // A TCP peer that connects and leaves: the peer is an optional field.
    let mut c = TcpStream::connect(tcp_addr).expect("connect");
    c.write_all(b"").expect("write");
    lines.extend(read_until(&rx, 10, |l| l.contains("DAQ connected")));
    drop(c);
    lines.extend(read_until(&rx, 10, |l| l.contains("closed by the peer")));
    lines.extend(stop(&mut d, &rx));

    let events = parse_all(&lines);
    let listening = find(&events, "bandwatch listening");
    assert!(listening["channels"].is_u64(), "{listening}");
    let udp = find(&events, "receiving BWF1 datagrams");
    assert!(udp["recv_buffer_bytes"].is_u64(), "{udp}");
    let rejected = find(&events, "rejected");
    assert!(rejected["suppressed"].is_u64(), "{rejected}");
    assert!(rejected["reason"].is_string(), "{rejected}");
    let closed = find(&events, "closed by the peer");
    assert!(
        closed["peer"]
            .as_str()
            .is_some_and(|p| p.starts_with("127.0.0.1:")),
        "{closed}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn replay_logs_its_rejections_as_an_object() {
    let dir = temp_dir("logs-replay");
    let cfg = dir.join("lines.toml");
    std::fs::write(
        &cfg,
        "[server]\nlisten = \"127.0.0.1:0\"\n[[source]]\nname = \"box\"\nkind = \"tcp-listen\"\n\
         listen = \"127.0.0.1:0\"\nframing = \"lines\"\nchannels = 2\nsample_rate_hz = 1000\n\
         [[channel]]\nname = \"a\"\nsource = \"box\"\nindex = 0\nunit = \"g\"\nblock = 256\n",
    )
    .expect("config");
    // 2000 good instants, 3 lines with a wrong count, 2 with a bad number.
    let mut text = String::new();
    for i in 0..2000 {
        text.push_str(&format!("{}, 0.5\n", (i as f64 * 0.1).sin()));
        if i % 500 == 7 && i < 1500 {
            text.push_str("1, 2, 3\n");
        }
        if i == 100 || i == 900 {
            text.push_str("x, 1\n");
        }
    }
    let rec = dir.join("rec.txt");
    std::fs::write(&rec, text).expect("recording");
    let out = Command::new(env!("CARGO_BIN_EXE_bandwatch"))
        .args(["--log-format", "json", "replay"])
        .arg(&rec)
        .arg("--config")
        .arg(&cfg)
        .output()
        .expect("replay");
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(0), "{err}");
    let lines: Vec<String> = err
        .lines()
        .filter(|l| !l.is_empty())
        .map(String::from)
        .collect();
    let events = parse_all(&lines);
    let done = find(&events, "replay done");
    assert!(done["frames"].is_u64(), "{done}");
    let rejected = done["rejected"]
        .as_object()
        .unwrap_or_else(|| panic!("{done}"));
    let total: u64 = rejected
        .values()
        .map(|v| v.as_u64().expect("a number"))
        .sum();
    assert_eq!(total, 5, "{done}");
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn text_logs_into_a_pipe_have_no_escape_codes() {
    let dir = temp_dir("logs-text");
    let (mut d, rx) = start(&dir, "text", &[]);
    let mut lines = read_until(&rx, 30, |l| l.contains("listening for a DAQ connection"));
    lines.extend(stop(&mut d, &rx));
    assert!(
        lines.iter().any(|l| l.contains("bandwatch listening")),
        "{lines:#?}"
    );
    for l in &lines {
        assert!(!l.contains('\u{1b}'), "ESC in {l:?}");
    }
    let _ = std::fs::remove_dir_all(&dir);
}
