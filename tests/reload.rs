//! Config reload (README "Reloading the config"): in process, every case
//! (kept, changed limit, added, removed, refused, a source moved to a new
//! port), the HTTP endpoint, SIGHUP to the real binary, and counters that
//! balance across reloads under ingest load. Everything on 127.0.0.1.

mod common;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::Duration;

use bandwatch::alarm::engine::AlarmCommand;
use bandwatch::alarm::state::AlarmState;
use bandwatch::counters::GapReason;
use bandwatch::pipeline::state::{AppState, ChannelShared};
use bandwatch::tools::send::{send, Faults, SendOptions, WireFormat};
use bandwatch::tools::Endpoint;
use bandwatch::Pipeline;

use common::{free_tcp_port, free_udp_port, get, wait_for};

const TOKEN: &str = "reload-test-token-0123456789abcdef";

/// A fresh directory for one test's alarm storage and config file.
fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("bandwatch-reload-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    let token = d.join("token");
    std::fs::write(&token, format!("{TOKEN}\n")).expect("token");
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&token, std::fs::Permissions::from_mode(0o600)).expect("chmod");
    }
    d
}

/// The pieces of the test config that a reload changes.
struct Knobs<'a> {
    workers: usize,
    /// The `danger` limit of channel "lim"'s alarm.
    lim_danger: f64,
    /// Whether channel "gone" is configured, and channel "new".
    gone: bool,
    new: bool,
    daq_port: u16,
    /// Extra text for channel "kept" (a change of its signal settings).
    kept_extra: &'a str,
}

impl Knobs<'static> {
    /// The starting config: limit 2, "gone" configured, "new" not, "kept"
    /// as it is.
    fn first(workers: usize, daq_port: u16) -> Self {
        Knobs {
            workers,
            lim_danger: 2.0,
            gone: true,
            new: false,
            daq_port,
            kept_extra: "",
        }
    }
}

/// Two sources: the simulator (4x real time) and a UDP DAQ box.
/// "kept": a latching alarm that trips at once, acknowledged by the
/// test, and a learned baseline; "lim": a latching alarm whose limit a
/// reload changes; "gone" removed, "new" added; "net" on the UDP source.
fn config_text(dir: &Path, k: &Knobs<'_>) -> String {
    let band = |latching: bool, alert: f64, danger: f64| {
        format!(
            "  [[channel.band]]\n  name = \"all\"\n  lo_hz = 10\n  hi_hz = 12000\n    [channel.band.alarm]\n    latching = {latching}\n    alert = {{ limit = {alert:?} }}\n    danger = {{ limit = {danger:?} }}\n"
        )
    };
    let channel = |name: &str, source: &str, index: usize| {
        format!(
            "[[channel]]\nname = \"{name}\"\nsource = \"{source}\"\nindex = {index}\nunit = \"g\"\nblock = 4096\noverlap = 0.5\naveraging = {{ mode = \"linear\", count = 2 }}\n"
        )
    };
    let mut t = format!(
        "[server]\nlisten = \"127.0.0.1:0\"\n[dsp]\nworkers = {}\nring_seconds = 2.0\n[alarms]\nstorage_dir = \"{}\"\ntoken_file = \"{}\"\n",
        k.workers,
        dir.join("store").display(),
        dir.join("token").display()
    );
    t.push_str("[[source]]\nname = \"sim\"\nkind = \"sim\"\nscenario = \"p2-pump\"\nseed = 2\nspeed = 4.0\n");
    t.push_str(&format!(
        "[[source]]\nname = \"daq\"\nkind = \"udp\"\nlisten = \"127.0.0.1:{}\"\nchannels = 4\nsample_rate_hz = 25600\n",
        k.daq_port
    ));
    t.push_str(&channel("kept", "sim", 0));
    t.push_str(k.kept_extra);
    t.push_str(&band(true, 1.0, 2.0));
    t.push_str("  [[channel.band]]\n  name = \"base\"\n  lo_hz = 10\n  hi_hz = 1000\n    [channel.band.alarm]\n    alert = { factor = 100.0 }\n    danger = { factor = 200.0 }\n    baseline = { learn_s = 1.0 }\n");
    t.push_str(&channel("lim", "sim", 1));
    t.push_str(&band(true, 1.0, k.lim_danger));
    if k.gone {
        t.push_str(&channel("gone", "sim", 2));
        t.push_str(&band(false, 1e12, 2e12));
    }
    if k.new {
        t.push_str(&channel("new", "sim", 3));
        t.push_str(&band(false, 1e12, 2e12));
    }
    t.push_str(&channel("net", "daq", 0));
    t
}

fn parse(text: &str) -> bandwatch::config::Config {
    match bandwatch::config::parse_str(text) {
        Ok(c) => c,
        Err(e) => panic!("config: {e:?}\n{text}"),
    }
}

fn channel(state: &AppState, name: &str) -> Arc<ChannelShared> {
    state
        .channel(name)
        .cloned()
        .unwrap_or_else(|| panic!("no channel {name}"))
}

fn view(ch: &ChannelShared, alarm: usize) -> Option<bandwatch::alarm::engine::AlarmView> {
    ch.alarm_board.load_full()?.alarms.get(alarm).copied()
}

async fn ack(ch: &ChannelShared, alarm: usize) {
    let (tx, rx) = tokio::sync::oneshot::channel();
    assert!(ch.command(AlarmCommand::Ack { alarm, reply: tx }));
    let r = tokio::time::timeout(Duration::from_secs(5), rx)
        .await
        .expect("answered")
        .expect("reply");
    assert!(r.is_ok(), "ack: {:?}", r.err());
}

/// Wall clock, whole seconds since the Unix epoch (the trend's time).
fn now_s() -> u64 {
    bandwatch::clock::unix_now_ns() / 1_000_000_000
}

fn discontinuities(ch: &ChannelShared) -> u64 {
    GapReason::ALL
        .iter()
        .map(|&r| ch.counters.discontinuities(r))
        .sum()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reload_keeps_changes_adds_removes_and_refuses() {
    let dir = temp_dir("cases");
    let port = free_udp_port();
    let knobs = Knobs::first(2, port);
    let mut p = Pipeline::start(&parse(&config_text(&dir, &knobs))).expect("pipeline");
    let st0 = p.live.load_full();
    let kept = channel(&st0, "kept");
    let lim = channel(&st0, "lim");
    // The sim's band values (counts taken as g) are far above 2: both
    // latching alarms go to danger; "base" learns its baseline in 1 s.
    wait_for("alarms tripped and baseline learned", 30, || {
        let k = view(&kept, 0).is_some_and(|v| v.latched && v.state == AlarmState::Danger);
        let l = view(&lim, 0).is_some_and(|v| v.latched && v.state == AlarmState::Danger);
        let b = view(&kept, 1).is_some_and(|v| v.learning.is_none() && v.alert_limit.is_some());
        k && l && b
    })
    .await;
    ack(&kept, 0).await;
    wait_for("acknowledged", 5, || {
        view(&kept, 0).is_some_and(|v| v.acknowledged)
    })
    .await;
    let base_before = view(&kept, 1).expect("base");
    let lim_before = view(&lim, 0).expect("lim");

    // Refused: two things that need a restart, and nothing changes.
    let mut bad = parse(&config_text(
        &dir,
        &Knobs {
            workers: 3,
            ..knobs
        },
    ));
    bad.listen = "127.0.0.1:1".parse().expect("addr");
    // A history turned on by a reload needs a restart too.
    bad.history = parse(&format!(
        "{}\n[history]\nfile = {:?}\n",
        config_text(&dir, &knobs),
        dir.join("h.sqlite").display().to_string()
    ))
    .history;
    assert!(bad.history.is_some());
    let e = p.reload(&bad).await.expect_err("needs a restart");
    let paths: Vec<&str> = e.problems().iter().map(|x| x.path.as_str()).collect();
    assert_eq!(paths, ["server.listen", "history", "dsp.workers"], "{e}");
    assert!(
        Arc::ptr_eq(&p.live.load_full(), &st0),
        "a refused reload changes nothing"
    );

    let seq_before = kept.latest().map_or(0, |s| s.seq);
    let reload_s = now_s();
    let processed_before = kept.counters.samples_processed.load(Ordering::Relaxed);
    let breaks_before = discontinuities(&kept);

    // Applied: "lim"'s danger limit raised, "gone" removed, "new" added,
    // "daq" moved to another port.
    let port2 = free_udp_port();
    let good = Knobs {
        lim_danger: 1e12,
        gone: false,
        new: true,
        daq_port: port2,
        ..knobs
    };
    let s = p
        .reload(&parse(&config_text(&dir, &good)))
        .await
        .expect("reload");
    assert_eq!(s.kept, ["kept", "net"]);
    assert_eq!(s.changed, ["lim"]);
    assert_eq!(s.added, ["new"]);
    assert_eq!(s.removed, ["gone"]);
    assert!(s.restarted.is_empty());
    assert_eq!(s.sources_restarted, ["daq"]);
    let st1 = p.live.load_full();

    // Kept: the same channel, DSP and alarms; nothing started over.
    assert!(Arc::ptr_eq(&channel(&st1, "kept"), &kept));
    wait_for("a new result on the kept channel", 10, || {
        kept.latest().is_some_and(|s| s.seq > seq_before)
    })
    .await;
    assert!(kept.counters.samples_processed.load(Ordering::Relaxed) > processed_before);
    assert_eq!(
        discontinuities(&kept),
        breaks_before,
        "no break on a kept channel"
    );
    let k = view(&kept, 0).expect("kept alarm");
    assert!(
        k.latched && k.acknowledged && k.state == AlarmState::Danger,
        "{k:?}"
    );
    let b = view(&kept, 1).expect("base");
    assert_eq!(b.learning, None, "the baseline is not learned again");
    assert_eq!(b.alert_limit, base_before.alert_limit);

    // Changed limit: in force at once, latch and history kept.
    let lim1 = channel(&st1, "lim");
    assert!(!Arc::ptr_eq(&lim1, &lim));
    assert_eq!(
        lim1.spec.alarms[0]
            .spec
            .danger
            .map(|l| format!("{:?}", l.source)),
        Some("Fixed(1000000000000.0)".into())
    );
    wait_for("the new limit shown", 5, || {
        view(&lim1, 0).is_some_and(|v| v.danger_limit.is_some_and(|d| d > 1e11))
    })
    .await;
    let l = view(&lim1, 0).expect("lim alarm");
    assert!(
        l.latched && l.state == AlarmState::Danger,
        "latch kept: {l:?}"
    );
    assert!(l
        .transitions
        .iter()
        .zip(lim_before.transitions)
        .all(|(a, b)| *a >= b));
    assert!(Arc::ptr_eq(&lim1.counters, &lim.counters));
    // Its trend is the same one: the points from before the reload stay,
    // and the worker goes on into it.
    assert!(Arc::ptr_eq(&lim1.trend, &lim.trend));
    assert!(lim1
        .trend
        .read(600, now_s())
        .t
        .first()
        .is_some_and(|&t| t <= reload_s));
    wait_for("the changed channel's trend goes on", 10, || {
        lim1.trend.read(600, now_s()).t.last() > Some(&reload_s)
    })
    .await;

    // Added: publishes. Removed: gone from the state and from /metrics.
    let new = channel(&st1, "new");
    wait_for("the added channel publishes", 15, || new.latest().is_some()).await;
    assert!(st1.channel("gone").is_none());
    let m = bandwatch::http::metrics::Metrics::live(p.live.clone());
    let text = String::from_utf8(m.render_fresh().expect("render")).expect("utf-8");
    assert!(!text.contains("channel=\"gone\""), "no stale series");
    assert!(text.contains("bandwatch_channel_spectra_total{channel=\"new\"}"));
    assert!(text.contains("bandwatch_config_reloads_total{result=\"success\"} 1"));
    assert!(text.contains("bandwatch_config_reloads_total{result=\"failure\"} 1"));
    assert!(text.contains("bandwatch_config_last_reload_successful 1"));

    // The moved source listens on the new port only.
    wait_for("old port released", 5, || {
        std::net::UdpSocket::bind(("127.0.0.1", port)).is_ok()
    })
    .await;
    assert!(
        std::net::UdpSocket::bind(("127.0.0.1", port2)).is_err(),
        "new port bound"
    );
    let report = send(
        SendOptions {
            to: Endpoint::Udp(format!("127.0.0.1:{port2}")),
            format: WireFormat::Bwf1(bandwatch::frame::SampleFormat::F32),
            rate_x: 4.0,
            seconds: Some(0.5),
            frame_samples: 256,
            seed: 2,
            faults: Faults::default(),
        },
        std::future::pending(),
    )
    .await
    .expect("send");
    let net = channel(&st1, "net");
    wait_for("the moved source receives", 10, || {
        net.counters.samples_in.load(Ordering::Relaxed) == report.instants
    })
    .await;
    p.stop().await;
    let _ = std::fs::remove_dir_all(&dir);
}

/// A signal-settings change restarts the channel: a new DSP, counters
/// carried on (never lower), latches carried over from its board.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_changed_signal_setting_restarts_the_channel_and_keeps_its_latch() {
    let dir = temp_dir("restart");
    let knobs = Knobs {
        gone: false,
        ..Knobs::first(1, free_udp_port())
    };
    let mut p = Pipeline::start(&parse(&config_text(&dir, &knobs))).expect("pipeline");
    let kept = channel(&p.live.load_full(), "kept");
    wait_for("latched", 30, || view(&kept, 0).is_some_and(|v| v.latched)).await;
    let blocks = kept.counters.blocks.load(Ordering::Relaxed);
    assert!(!kept.trend.read(600, now_s()).t.is_empty());
    let reload_s = now_s();
    let s = p
        .reload(&parse(&config_text(
            &dir,
            &Knobs {
                kept_extra: "window = \"flat-top\"\n",
                ..knobs
            },
        )))
        .await
        .expect("reload");
    assert_eq!(s.restarted, ["kept"]);
    let again = channel(&p.live.load_full(), "kept");
    assert!(!Arc::ptr_eq(&again, &kept));
    assert!(Arc::ptr_eq(&again.counters, &kept.counters));
    assert!(again.counters.blocks.load(Ordering::Relaxed) >= blocks);
    wait_for("the restarted channel publishes", 15, || {
        again.latest().is_some()
    })
    .await;
    let v = view(&again, 0).expect("alarm");
    assert!(v.latched, "latch carried over: {v:?}");
    // The trend starts over with the new signal settings.
    assert!(!Arc::ptr_eq(&again.trend, &kept.trend));
    wait_for("the restarted channel's trend", 10, || {
        !again.trend.read(600, now_s()).t.is_empty()
    })
    .await;
    assert!(again.trend.read(600, now_s()).t[0] >= reload_s);
    p.stop().await;
    let _ = std::fs::remove_dir_all(&dir);
}

/// One HTTP request over a fresh connection; the raw response parsed.
async fn request(
    addr: SocketAddr,
    method: &str,
    path: &str,
    auth: Option<&str>,
) -> common::Response {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut s = tokio::net::TcpStream::connect(addr).await.expect("connect");
    let auth = auth.map_or(String::new(), |t| format!("Authorization: Bearer {t}\r\n"));
    let req = format!("{method} {path} HTTP/1.1\r\nHost: x\r\n{auth}Content-Length: 0\r\nConnection: close\r\n\r\n");
    s.write_all(req.as_bytes()).await.expect("write");
    let mut raw = Vec::new();
    tokio::time::timeout(Duration::from_secs(30), s.read_to_end(&mut raw))
        .await
        .expect("answer in time")
        .expect("read");
    common::parse(&raw).expect("http")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn post_reload_needs_the_token_and_answers_every_problem() {
    let dir = temp_dir("http");
    let file = dir.join("bandwatch.toml");
    let knobs = Knobs::first(1, free_udp_port());
    std::fs::write(&file, config_text(&dir, &knobs)).expect("write");
    let cfg = bandwatch::config::load(&file).expect("config");
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let path = file.clone();
    let loader: bandwatch::pipeline::reload::ConfigLoader =
        Arc::new(move || bandwatch::config::load(&path));
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(bandwatch::daemon::serve_with(
        cfg,
        listener,
        async move {
            let _ = stop_rx.await;
        },
        Some(loader),
    ));

    let r = request(addr, "POST", "/api/v1/reload", None).await;
    assert_eq!(r.status, 401, "{}", r.text());

    // Two problems at once, each with its field path.
    let broken = config_text(&dir, &knobs)
        .replacen("block = 4096", "block = 3", 1)
        .replacen("ring_seconds = 2.0", "ring_seconds = 0.001", 1);
    std::fs::write(&file, broken).expect("write");
    let r = request(addr, "POST", "/api/v1/reload", Some(TOKEN)).await;
    assert_eq!(r.status, 422, "{}", r.text());
    let problems = r.json()["problems"].as_array().cloned().expect("problems");
    let paths: Vec<String> = problems
        .iter()
        .map(|p| p["path"].as_str().unwrap_or("").to_string())
        .collect();
    assert!(paths.iter().any(|p| p == "dsp.ring_seconds"), "{paths:?}");
    assert!(
        paths
            .iter()
            .any(|p| p.contains("kept") && p.contains("block")),
        "{paths:?}"
    );
    assert!(problems
        .iter()
        .all(|p| !p["message"].as_str().unwrap_or("").is_empty()));
    // The old config runs on: "gone" still served.
    assert_eq!(get(addr, "/api/v1/channels/gone").await.status, 200);

    std::fs::write(
        &file,
        config_text(
            &dir,
            &Knobs {
                gone: false,
                new: true,
                ..knobs
            },
        ),
    )
    .expect("write");
    let r = request(addr, "POST", "/api/v1/reload", Some(TOKEN)).await;
    assert_eq!(r.status, 200, "{}", r.text());
    assert_eq!(r.json()["summary"]["removed"][0], "gone");
    assert_eq!(r.json()["summary"]["added"][0], "new");
    assert_eq!(get(addr, "/api/v1/channels/gone").await.status, 404);
    assert_eq!(get(addr, "/api/v1/channels/new").await.status, 200);
    let metrics = get(addr, "/metrics").await.text();
    assert!(!metrics.contains("channel=\"gone\""));
    assert!(metrics.contains("bandwatch_config_reloads_total{result=\"failure\"} 1"));
    assert!(metrics.contains("bandwatch_config_reloads_total{result=\"success\"} 1"));

    let _ = stop_tx.send(());
    let done = tokio::time::timeout(Duration::from_secs(20), server).await;
    assert!(matches!(done, Ok(Ok(Ok(())))), "stopped cleanly");
    let _ = std::fs::remove_dir_all(&dir);
}

/// SIGHUP reloads the real binary and does not end it; SIGTERM later
/// ends it with 0.
#[test]
fn sighup_reloads_the_real_daemon() {
    let dir = temp_dir("sighup");
    let file = dir.join("bandwatch.toml");
    let knobs = Knobs::first(1, free_udp_port());
    let http = free_tcp_port();
    let text = |k: &Knobs<'_>| {
        config_text(&dir, k).replacen("127.0.0.1:0", &format!("127.0.0.1:{http}"), 1)
    };
    std::fs::write(&file, text(&knobs)).expect("write");
    let log = std::fs::File::create(dir.join("stderr")).expect("log");
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_bandwatch"))
        .args(["run", "--config"])
        .arg(&file)
        .stderr(log)
        .stdout(std::process::Stdio::null())
        .spawn()
        .expect("spawn");
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let addr: SocketAddr = format!("127.0.0.1:{http}").parse().expect("addr");
    let up = rt.block_on(async {
        for _ in 0..300 {
            if let Ok(r) = common::try_get(addr, "/api/v1/channels/gone").await {
                return r.status == 200;
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        false
    });
    assert!(up, "daemon up");
    std::fs::write(
        &file,
        text(&Knobs {
            gone: false,
            new: true,
            ..knobs
        }),
    )
    .expect("write");
    let pid = child.id().to_string();
    let kill = |sig: &str| {
        let ok = std::process::Command::new("kill")
            .args([sig, pid.as_str()])
            .status()
            .expect("kill")
            .success();
        assert!(ok, "kill {sig}");
    };
    kill("-HUP");
    let reloaded = rt.block_on(async {
        for _ in 0..100 {
            if let Ok(r) = common::try_get(addr, "/api/v1/channels/new").await {
                if r.status == 200 {
                    return true;
                }
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        false
    });
    assert!(reloaded, "the new channel is served after SIGHUP");
    assert!(
        child.try_wait().expect("wait").is_none(),
        "still running after SIGHUP"
    );
    let stderr = std::fs::read_to_string(dir.join("stderr")).expect("stderr");
    assert!(stderr.contains("config reloaded"), "{stderr}");

    // `[metrics]` is applied by a reload; an entry that matches no
    // family is refused (README "Trimming /metrics"), the old trim runs on.
    let scrape = |rt: &tokio::runtime::Runtime| {
        let r = rt
            .block_on(common::try_get(addr, "/metrics"))
            .expect("GET /metrics");
        assert_eq!(r.status, 200);
        String::from_utf8(r.body).expect("utf-8")
    };
    let peak = "bandwatch_band_peak_frequency_hertz{";
    let limit = "bandwatch_alarm_limit_meters_per_second_squared{";
    let body = scrape(&rt);
    assert!(body.contains(peak) && body.contains(limit), "{body}");
    let base = text(&Knobs {
        gone: false,
        new: true,
        ..knobs
    });
    std::fs::write(
        &file,
        format!("{base}[metrics]\nexclude = [\"bandwatch_band_peak_frequency_hertz\"]\n"),
    )
    .expect("write");
    kill("-HUP");
    let mut trimmed = false;
    for _ in 0..100 {
        std::thread::sleep(Duration::from_millis(100));
        let body = scrape(&rt);
        if !body.contains(peak) {
            assert!(
                body.contains(limit),
                "only the excluded family goes: {body}"
            );
            trimmed = true;
            break;
        }
    }
    assert!(trimmed, "the [metrics] reload took effect");
    std::fs::write(
        &file,
        format!("{base}[metrics]\nexclude = [\"bandwatch_band_peak_frequency_herz\"]\n"),
    )
    .expect("write");
    kill("-HUP");
    let mut refused = String::new();
    for _ in 0..100 {
        std::thread::sleep(Duration::from_millis(100));
        let stderr = std::fs::read_to_string(dir.join("stderr")).expect("stderr");
        if stderr.contains("metrics.exclude[0]") {
            refused = stderr;
            break;
        }
    }
    assert!(
        refused.contains("bandwatch_band_peak_frequency_herz"),
        "the typo is named: {refused}"
    );
    let body = scrape(&rt);
    assert!(!body.contains(peak), "the old trim runs on");
    kill("-TERM");
    let mut status = None;
    for _ in 0..200 {
        if let Some(s) = child.try_wait().expect("wait") {
            status = Some(s);
            break;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    let Some(status) = status else {
        let _ = child.kill();
        panic!("no exit within 10 s of SIGTERM");
    };
    assert_eq!(status.code(), Some(0));
    let _ = std::fs::remove_dir_all(&dir);
}

/// A real TCP sender streams into the DAQ source at full rate through
/// several reloads that add and remove a channel on that same source and
/// change a limit: on the channels no reload touches, every instant sent
/// is received and processed, none dropped, no break.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn counters_balance_across_reloads_under_load() {
    let dir = temp_dir("load");
    let port = free_tcp_port();
    let text = |extra: bool, limit: f64| {
        let ch = |name: &str, index: usize| {
            format!("[[channel]]\nname = \"{name}\"\nsource = \"daq\"\nindex = {index}\nunit = \"g\"\nblock = 4096\noverlap = 0.5\naveraging = {{ mode = \"linear\", count = 4 }}\n")
        };
        let mut t = format!("[server]\nlisten = \"127.0.0.1:0\"\n[dsp]\nworkers = 2\nring_seconds = 2.0\n[alarms]\nstorage_dir = \"{}\"\n[[source]]", dir.join("store").display());
        t.push_str(&format!("\nname = \"daq\"\nkind = \"tcp-listen\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\n"));
        t.push_str(&ch("a", 0));
        t.push_str(&ch("b", 1));
        t.push_str(&format!(
            "overall_alarm = {{ rms = {{ alert = {{ limit = {limit:?} }} }} }}\n"
        ));
        if extra {
            t.push_str(&ch("extra", 3));
        }
        parse(&t)
    };
    let mut p = Pipeline::start(&text(false, 1.0)).expect("pipeline");
    wait_for("listening", 5, || {
        std::net::TcpStream::connect(("127.0.0.1", port)).is_ok()
    })
    .await;
    let sender = tokio::spawn(send(
        SendOptions {
            to: Endpoint::Tcp(format!("127.0.0.1:{port}")),
            format: WireFormat::Bwf1(bandwatch::frame::SampleFormat::F32),
            rate_x: 1.0,
            seconds: Some(6.0),
            frame_samples: 256,
            seed: 2,
            faults: Faults::default(),
        },
        std::future::pending(),
    ));
    let mut reloads = 0;
    for i in 0..5 {
        tokio::time::sleep(Duration::from_millis(900)).await;
        let s = p
            .reload(&text(i % 2 == 0, 2.0 + i as f64))
            .await
            .expect("reload");
        assert_eq!(s.kept, ["a"], "{s:?}");
        assert_eq!(s.changed, ["b"], "{s:?}");
        reloads += 1;
    }
    let report = sender.await.expect("join").expect("send");
    let st = p.live.load_full();
    for name in ["a", "b"] {
        let ch = channel(&st, name);
        let c = &ch.counters;
        wait_for("the ring drained", 10, || {
            c.samples_processed.load(Ordering::Relaxed) == c.samples_in.load(Ordering::Relaxed)
                && c.samples_in.load(Ordering::Relaxed) == report.instants
        })
        .await;
        for r in GapReason::ALL {
            assert_eq!(c.dropped(r), 0, "{name}: dropped {r:?}");
        }
        // No break but the stream's first mark (a restart).
        for r in GapReason::ALL {
            let n = c.discontinuities(r);
            let most = u64::from(r == GapReason::Restart);
            assert!(n <= most, "{name}: {n} breaks {r:?}");
        }
    }
    assert_eq!(reloads, 5);
    assert_eq!(st.reloads.successes.load(Ordering::Relaxed), 5);
    p.stop().await;
    let _ = std::fs::remove_dir_all(&dir);
}
