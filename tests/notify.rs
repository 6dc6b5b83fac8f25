//! The systemd notify protocol, for real: a unix datagram socket in a
//! temporary directory plays the service manager (`NOTIFY_SOCKET`), the
//! real binary runs the sim on 127.0.0.1:0 with `WATCHDOG_USEC` = 2 s.
//! Message names are those of sd_notify(3) (systemd's documentation).

mod common;

use std::io::{Read, Write};
use std::net::TcpStream;
use std::os::unix::net::UnixDatagram;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use bandwatch::config::fixture::{Channel, Fixture, Source};

struct Daemon(Child);

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("bw-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

fn write_config(dir: &Path) -> PathBuf {
    let text = Fixture::new()
        .raw("[dsp]\nworkers = 2")
        .source(Source::new("sim", "sim"))
        .channel(
            Channel::new("a", "sim", 0)
                .block(4096)
                .band("v", 10.0, 1000.0),
        )
        .channel(
            Channel::new("b", "sim", 1)
                .block(4096)
                .band("v", 10.0, 1000.0),
        )
        .toml();
    let p = dir.join("bandwatch.toml");
    std::fs::write(&p, text).expect("config");
    p
}

/// Starts the daemon; returns it and the HTTP port its log line names.
fn start(config: &Path, env: &[(&str, &str)]) -> (Daemon, u16, mpsc::Receiver<String>) {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_bandwatch"));
    cmd.args(["run", "--config"])
        .arg(config)
        .args(["--listen", "127.0.0.1:0"])
        .env_remove("NOTIFY_SOCKET")
        .env_remove("WATCHDOG_USEC")
        .env_remove("WATCHDOG_PID")
        .stdout(Stdio::null());
    for (k, v) in env {
        cmd.env(k, v);
    }
    let (child, rx) = common::spawn_with_stderr_lines(&mut cmd);
    let deadline = Instant::now() + Duration::from_secs(30);
    let port = loop {
        let left = deadline.saturating_duration_since(Instant::now());
        let line = rx.recv_timeout(left).expect("the daemon's listening line");
        if let Some(rest) = line.split("http://127.0.0.1:").nth(1) {
            break rest
                .split('/')
                .next()
                .and_then(|p| p.parse::<u16>().ok())
                .expect("port");
        }
    };
    (Daemon(child), port, rx)
}

fn healthz(port: u16) -> Option<String> {
    let mut s = TcpStream::connect(("127.0.0.1", port)).ok()?;
    s.set_read_timeout(Some(Duration::from_secs(5))).ok()?;
    write!(
        s,
        "GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"
    )
    .ok()?;
    let mut text = String::new();
    s.read_to_string(&mut text).ok()?;
    Some(text)
}

fn sigterm(child: &Child) {
    let ok = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .expect("kill");
    assert!(ok.success());
}

fn wait_exit(d: &mut Daemon, within: Duration) -> Option<i32> {
    let deadline = Instant::now() + within;
    while Instant::now() < deadline {
        if let Ok(Some(st)) = d.0.try_wait() {
            return st.code();
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("the daemon did not exit within {within:?}");
}

#[test]
fn ready_status_watchdog_and_stopping_reach_the_socket() {
    let dir = temp_dir("notify");
    let sock_path = dir.join("notify.sock");
    let sock = UnixDatagram::bind(&sock_path).expect("bind the notify socket");
    sock.set_read_timeout(Some(Duration::from_millis(200)))
        .expect("timeout");
    let cfg = write_config(&dir);
    let (mut daemon, port, _log) = start(
        &cfg,
        &[
            ("NOTIFY_SOCKET", sock_path.to_str().expect("utf8 path")),
            ("WATCHDOG_USEC", "2000000"),
        ],
    );

    let mut buf = [0u8; 4096];
    let mut recv = || -> Vec<String> {
        match sock.recv(&mut buf) {
            Ok(n) => String::from_utf8_lossy(&buf[..n])
                .lines()
                .map(str::to_string)
                .collect(),
            Err(_) => Vec::new(),
        }
    };
    let (mut ready, mut status, mut pings) = (false, None::<String>, 0);
    let deadline = Instant::now() + Duration::from_secs(30);
    while !(ready && status.is_some() && pings >= 2) {
        assert!(
            Instant::now() < deadline,
            "ready {ready}, status {status:?}, {pings} watchdog ping(s) in 30 s"
        );
        for m in recv() {
            if m == "READY=1" {
                assert!(!ready, "READY=1 twice");
                ready = true;
                // By READY the HTTP listener answers.
                let r = healthz(port).expect("HTTP answers at READY");
                assert!(r.starts_with("HTTP/1.1 200"), "{r}");
            } else if let Some(s) = m.strip_prefix("STATUS=") {
                assert!(ready, "STATUS before READY: {s}");
                status = Some(s.to_string());
            } else if m == "WATCHDOG=1" {
                assert!(ready, "WATCHDOG before READY");
                pings += 1;
            }
        }
    }
    let status = status.unwrap_or_default();
    assert!(
        status.contains("2 channel(s)") && status.contains("source(s) up"),
        "{status}"
    );

    sigterm(&daemon.0);
    let deadline = Instant::now() + Duration::from_secs(10);
    let mut stopping = false;
    while !stopping {
        assert!(
            Instant::now() < deadline,
            "no STOPPING=1 within 10 s of SIGTERM"
        );
        stopping = recv().iter().any(|m| m == "STOPPING=1");
    }
    assert_eq!(wait_exit(&mut daemon, Duration::from_secs(10)), Some(0));
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn without_notify_socket_nothing_is_sent() {
    let dir = temp_dir("notify-off");
    let sock_path = dir.join("notify.sock");
    let sock = UnixDatagram::bind(&sock_path).expect("bind");
    sock.set_nonblocking(true).expect("nonblocking");
    let cfg = write_config(&dir);
    // The watchdog variable alone turns nothing on.
    let (mut daemon, port, _log) = start(&cfg, &[("WATCHDOG_USEC", "200000")]);
    let deadline = Instant::now() + Duration::from_secs(20);
    while healthz(port).is_none_or(|r| !r.starts_with("HTTP/1.1 200")) {
        assert!(Instant::now() < deadline, "no HTTP answer");
        std::thread::sleep(Duration::from_millis(50));
    }
    std::thread::sleep(Duration::from_millis(600));
    sigterm(&daemon.0);
    assert_eq!(wait_exit(&mut daemon, Duration::from_secs(10)), Some(0));
    let mut buf = [0u8; 256];
    assert!(sock.recv(&mut buf).is_err(), "a message arrived");
    let _ = std::fs::remove_dir_all(&dir);
}

/// The heartbeats the watchdog reads move on every worker, idle or busy
/// (an idle worker parks at most 20 ms per turn).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_worker_heartbeat_moves() {
    let text = Fixture::new()
        .raw("[dsp]\nworkers = 2")
        .source(Source::new("sim", "sim"))
        .channel(Channel::new("a", "sim", 0).block(4096))
        .channel(Channel::new("b", "sim", 1).block(4096))
        .toml();
    let cfg = bandwatch::config::parse_str(&text).expect("config");
    let p = bandwatch::Pipeline::start(&cfg).expect("pipeline");
    let beats = p.heartbeats();
    assert_eq!(beats.len(), 2);
    let before: Vec<u64> = beats.iter().map(|b| b.get()).collect();
    let deadline = Instant::now() + Duration::from_secs(10);
    loop {
        let now: Vec<u64> = beats.iter().map(|b| b.get()).collect();
        if bandwatch::daemon::notify::should_ping(&before, &now) {
            break;
        }
        assert!(Instant::now() < deadline, "{before:?} -> {now:?}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    p.stop().await;
}
