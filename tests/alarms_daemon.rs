//! Alarms in the running pipeline: the demo's bearing defect trips BPFO
//! normal → alert → danger with captures holding the impacts; a latched
//! alarm survives SIGKILL of the real daemon; a dead, clipped or
//! disconnected channel inhibits its alarms instead of tripping them.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use bandwatch::alarm::capture;
use bandwatch::alarm::journal;
use bandwatch::alarm::state::AlarmState;
use bandwatch::config::{parse_str, Config, Detrend};
use bandwatch::dsp::envelope::EnvelopeEngine;
use bandwatch::dsp::spectrum::SpectrumEngine;
use bandwatch::dsp::speed::track_peak;
use bandwatch::dsp::window::WindowKind;
use bandwatch::pipeline::state::ChannelShared;
use bandwatch::pipeline::worker::ChannelDsp;
use bandwatch::pipeline::{AlarmMode, Builder, RingSize};

fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("bandwatch-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

/// The demo config, sped up, storing into `dir`.
fn demo_text(dir: &Path, speed: f64) -> String {
    std::fs::read_to_string("config/demo.toml")
        .expect("demo config")
        .replace("seed = 2", &format!("seed = 2\nspeed = {speed}"))
        .replace(
            "storage_dir = \"../demo-data\"",
            &format!("storage_dir = {:?}", dir.join("data").display().to_string()),
        )
        .replace(
            "token_file = \"demo-token\"",
            &format!(
                "token_file = {:?}",
                std::fs::canonicalize("config/demo-token")
                    .expect("token")
                    .display()
                    .to_string()
            ),
        )
}

fn config(text: &str) -> Config {
    match parse_str(text) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    }
}

fn bpfo_state(state: &bandwatch::pipeline::state::AppState) -> Option<(AlarmState, bool)> {
    let ch = state.channel("pump-de")?;
    let i = ch.spec.alarms.iter().position(|a| a.name == "bpfo")?;
    let b = ch.alarm_board.load_full()?;
    b.alarms.get(i).map(|v| (v.state, v.latched))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn demo_bpfo_goes_alert_then_danger_and_captures_the_impacts() {
    let dir = temp_dir("demo-trip");
    let cfg = config(&demo_text(&dir, 20.0));
    let p = bandwatch::Pipeline::start(&cfg).expect("pipeline");
    let deadline = Instant::now() + Duration::from_secs(90);
    while bpfo_state(&p.state).map(|s| s.0) != Some(AlarmState::Danger) {
        assert!(
            Instant::now() < deadline,
            "BPFO never reached danger: {:?}",
            bpfo_state(&p.state)
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let caps = dir.join("data/captures");
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let l = capture::list(&caps).expect("list");
        if l.iter().filter(|c| c.band == "bpfo").count() >= 2 {
            break;
        }
        assert!(Instant::now() < deadline, "captures: {l:?}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    p.stop().await;

    // The journal holds the rising edges in order, each with its capture.
    let replay = journal::replay(&dir.join("data/journal"));
    let edges: Vec<(String, String, Option<String>)> = replay
        .events
        .iter()
        .filter(|e| e.band.as_deref() == Some("bpfo") && e.cause.as_deref() == Some("trip"))
        .map(|e| {
            (
                e.from.clone().unwrap_or_default(),
                e.to.clone().unwrap_or_default(),
                e.capture.clone(),
            )
        })
        .collect();
    assert!(edges.len() >= 2, "{edges:?}");
    assert_eq!(
        (edges[0].0.as_str(), edges[0].1.as_str()),
        ("normal", "alert")
    );
    assert_eq!(
        (edges[1].0.as_str(), edges[1].1.as_str()),
        ("alert", "danger")
    );

    // Each capture's waveform holds the impacts: its envelope spectrum has
    // its largest line in 60–120 Hz at BPFO = 3.6 × 24.75 = 89.1 Hz.
    for (_, _, id) in edges.iter().take(2) {
        let id = id.as_deref().expect("a capture per rising edge");
        let meta = capture::read_meta(&caps, id).expect("meta");
        assert_eq!(meta.trip.channel, "pump-de");
        let bytes = capture::read_waveform(&caps, id).expect("waveform");
        let mut d = bandwatch::frame::bwf1::StreamDecoder::new();
        d.push(&bytes);
        let mut x = Vec::new();
        while let Ok(Some(f)) = d.next_frame() {
            if let bandwatch::frame::Samples::F32(v) = f.samples {
                x.extend(v);
            }
        }
        assert_eq!(
            d.stats().rejected_total(),
            0,
            "capture {id} decodes cleanly"
        );
        let n = 8192;
        assert!(x.len() >= n, "capture {id} holds {} samples", x.len());
        let block = &x[x.len() - n..];
        let mut env = EnvelopeEngine::new(n, 25_600.0, 2000.0, 5000.0);
        let mut e = vec![0.0; n];
        env.envelope(block, &mut e);
        let mut s = SpectrumEngine::new(WindowKind::Hann, n, n, Detrend::Mean);
        let mut pw = vec![0.0; s.bins()];
        s.compute(&e, &mut pw);
        let df = 25_600.0 / n as f64;
        let k = track_peak(&pw, (60.0 / df) as usize, (120.0 / df) as usize).expect("peak");
        assert!(
            (k * df - 89.1).abs() < 2.0 * df,
            "capture {id}: envelope line at {} Hz",
            k * df
        );
    }
    let _ = std::fs::remove_dir_all(&dir);
}

/// Kills the daemon when the test ends, passed or failed.
struct Daemon(std::process::Child);

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

#[test]
fn latched_alarm_survives_sigkill_and_no_capture_is_half_written() {
    use std::io::{BufRead, BufReader, Read, Write};
    use std::net::TcpStream;
    use std::process::{Command, Stdio};

    let dir = temp_dir("sigkill");
    let cfg_path = dir.join("demo.toml");
    std::fs::write(&cfg_path, demo_text(&dir, 20.0)).expect("config");
    let bin = env!("CARGO_BIN_EXE_bandwatch");
    let get = |port: u16, path: &str| -> Option<serde_json::Value> {
        let mut s = TcpStream::connect(("127.0.0.1", port)).ok()?;
        s.set_read_timeout(Some(Duration::from_secs(5))).ok()?;
        write!(
            s,
            "GET {path} HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"
        )
        .ok()?;
        let mut body = String::new();
        s.read_to_string(&mut body).ok()?;
        let json = body.split("\r\n\r\n").nth(1)?;
        // The body may be chunked; take the JSON object.
        let start = json.find('{')?;
        let end = json.rfind('}')?;
        serde_json::from_str(&json[start..=end]).ok()
    };
    let start = || {
        let mut child = Command::new(bin)
            .args([
                "run",
                "--config",
                cfg_path.to_str().expect("path"),
                "--listen",
                "127.0.0.1:0",
            ])
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .expect("daemon");
        // The log line names the port it bound.
        let err = child.stderr.take().expect("stderr");
        let mut lines = BufReader::new(err).lines();
        let port = loop {
            let line = lines.next().expect("daemon log").expect("log line");
            if let Some(rest) = line.split("http://127.0.0.1:").nth(1) {
                break rest
                    .split('/')
                    .next()
                    .expect("port")
                    .parse::<u16>()
                    .expect("port");
            }
        };
        std::thread::spawn(move || for _ in lines {});
        (Daemon(child), port)
    };
    let bpfo = |v: &serde_json::Value| -> Option<(String, bool)> {
        v["alarms"]
            .as_array()?
            .iter()
            .find(|a| a["band"] == "bpfo")
            .map(|a| {
                (
                    a["state"].as_str().unwrap_or("").to_string(),
                    a["latched"].as_bool().unwrap_or(false),
                )
            })
    };

    let (mut child, port) = start();
    let deadline = Instant::now() + Duration::from_secs(90);
    loop {
        if let Some((s, latched)) = get(port, "/api/v1/alarms").as_ref().and_then(bpfo) {
            if s == "danger" && latched {
                break;
            }
        }
        assert!(Instant::now() < deadline, "no latched danger in time");
        std::thread::sleep(Duration::from_millis(50));
    }
    // Kill it hard; a capture may be in the middle of being written.
    child.0.kill().expect("SIGKILL");
    let _ = child.0.wait();

    let (child, port) = start();
    let deadline = Instant::now() + Duration::from_secs(30);
    // A restarted channel is not OK until data has flowed for recover_s,
    // so the alarm shows inhibited first; the latch holds all along.
    let after = loop {
        if let Some(b) = get(port, "/api/v1/alarms").as_ref().and_then(bpfo) {
            if b.0 != "unknown" {
                assert!(b.1, "the latch holds from the start: {b:?}");
            }
            if b.0 != "unknown" && b.0 != "inhibited" {
                break b;
            }
        }
        assert!(Instant::now() < deadline, "restarted daemon did not answer");
        std::thread::sleep(Duration::from_millis(50));
    };
    assert!(after.1, "the latch survived the kill: {after:?}");
    assert_eq!(after.0, "danger", "a latched danger still shows danger");
    drop(child);

    // The journal is readable (at most a torn last line), every capture
    // left is whole, and no temporary file remains under a final name.
    let replay = journal::replay(&dir.join("data/journal"));
    assert!(
        replay.bad_lines <= 1,
        "journal bad lines: {}",
        replay.bad_lines
    );
    let caps = dir.join("data/captures");
    for c in capture::list(&caps).expect("list") {
        let bytes = capture::read_waveform(&caps, &c.id).expect("waveform of every listed capture");
        let mut d = bandwatch::frame::bwf1::StreamDecoder::new();
        d.push(&bytes);
        while let Ok(Some(_)) = d.next_frame() {}
        assert_eq!(d.stats().rejected_total(), 0, "capture {} is whole", c.id);
        assert!(d.finish().is_ok(), "capture {} has no torn tail", c.id);
    }
    let _ = std::fs::remove_dir_all(&dir);
}

/// One channel with a fixed limit on an all-lines band, fed by hand.
fn fed_channel(health: &str) -> (Arc<ChannelShared>, bandwatch::ring::RingWriter, ChannelDsp) {
    let text = format!(
        r#"
[server]
listen = "127.0.0.1:0"
[alarms]
storage_dir = "/nonexistent-not-used"
[[source]]
name = "s"
kind = "sim"
[[channel]]
name = "c"
source = "s"
index = 0
unit = "g"
block = 1024
overlap = 0.0
averaging = {{ mode = "none" }}
health = {health}
  [[channel.band]]
  name = "all"
  lo_hz = 10
  hi_hz = 12000
    [channel.band.alarm]
    alert = {{ limit = 0.5 }}
    danger = {{ limit = 1.0 }}
"#
    );
    let cfg = config(&text);
    // As the daemon builds it, with alarms in memory (the storage_dir
    // above is never opened).
    let mut p = Builder::new(&cfg)
        .ring(RingSize::Headroom(1 << 20))
        .alarms(AlarmMode::InMemory)
        .gather(false)
        .assemble()
        .expect("assemble")
        .inline();
    let w = p.take_inputs().pop().expect("one input").writer;
    let dsp = p.channels.pop().expect("one channel");
    (dsp.shared().clone(), w, dsp)
}

fn state_of(shared: &ChannelShared) -> (bool, AlarmState) {
    let b = shared.alarm_board.load_full().expect("board");
    (b.health.ok, b.alarms[0].state)
}

fn tone(first: u64, n: usize, a: f64) -> Vec<f32> {
    (0..n)
        .map(|i| {
            (a * (2.0 * std::f64::consts::PI * 500.0 * (first + i as u64) as f64 / 25_600.0).sin())
                as f32
        })
        .collect()
}

/// Writes `seconds` of samples made by `f` in 0.1 s pieces with timestamps.
fn feed(
    w: &mut bandwatch::ring::RingWriter,
    dsp: &mut ChannelDsp,
    from_s: f64,
    seconds: f64,
    f: &dyn Fn(u64, usize) -> Vec<f32>,
) {
    let t0 = 1_800_000_000.0;
    let step = 2560;
    let mut s = (from_s * 25_600.0) as u64;
    let end = ((from_s + seconds) * 25_600.0) as u64;
    while s < end {
        let ts = ((t0 + s as f64 / 25_600.0) * 1e9) as u64;
        w.write(s, ts, &f(s, step));
        while dsp.poll() {}
        s += step as u64;
    }
}

#[test]
fn healthy_channel_trips_but_flatline_and_clipping_inhibit() {
    let health = "{ flatline = { std_below = 0.001, for_s = 1.0 }, clipping = { full_scale = 2.0 }, recover_s = 1.0 }";
    // Healthy: a 1.2 g-peak tone (0.85 g RMS) is above alert (0.5), below
    // danger (1.0).
    let (sh, mut w, mut dsp) = fed_channel(health);
    feed(&mut w, &mut dsp, 0.0, 3.0, &|s, n| tone(s, n, 1.2));
    let (ok, st) = state_of(&sh);
    assert!(ok, "a live 1.2 g tone is healthy");
    assert_eq!(st, AlarmState::Alert, "a live 0.85 g RMS trips alert");
    // Flatline: the sensor goes dead (constant output).
    let (sh, mut w, mut dsp) = fed_channel(health);
    feed(&mut w, &mut dsp, 0.0, 3.0, &|s, n| tone(s, n, 0.9));
    feed(&mut w, &mut dsp, 3.0, 3.0, &|_, n| vec![0.3; n]);
    let (ok, st) = state_of(&sh);
    assert!(!ok, "flat signal is not OK");
    assert_eq!(st, AlarmState::Inhibited);
    // Clipping: samples at full scale.
    let (sh, mut w, mut dsp) = fed_channel(health);
    feed(&mut w, &mut dsp, 0.0, 3.0, &|s, n| {
        tone(s, n, 5.0)
            .into_iter()
            .map(|v| v.clamp(-2.0, 2.0))
            .collect()
    });
    let (ok, st) = state_of(&sh);
    assert!(!ok, "clipped signal is not OK");
    assert_eq!(
        st,
        AlarmState::Inhibited,
        "a clipped sensor inhibits instead of tripping"
    );
}

#[test]
fn disconnected_channel_goes_stale_and_a_gap_never_trips() {
    let health = "{ stale = { after_s = 0.3 }, recover_s = 0.2 }";
    let (sh, mut w, mut dsp) = fed_channel(health);
    // Below the limits, with a gap (a jump in the sample index) every 0.5 s:
    // gaps alone never make a level alarm.
    for k in 0..6u64 {
        let from = k as f64 * 0.6;
        feed(&mut w, &mut dsp, from, 0.5, &|s, n| tone(s, n, 0.3));
    }
    let (ok, st) = state_of(&sh);
    assert!(ok);
    assert_eq!(st, AlarmState::Normal, "gaps are not a level alarm");
    // No more samples: after 0.3 s the channel is stale and inhibited.
    std::thread::sleep(Duration::from_millis(600));
    dsp.poll();
    let (ok, st) = state_of(&sh);
    assert!(!ok, "no samples for longer than after_s: not OK");
    assert_eq!(st, AlarmState::Inhibited);
}
