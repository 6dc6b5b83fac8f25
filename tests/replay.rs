//! The same bytes give the same numbers live and in replay; `record` keeps
//! a stream exactly as received.

use std::collections::HashMap;
use std::time::{Duration, Instant};

use bandwatch::config::parse_str;
use bandwatch::frame::SampleFormat;
use bandwatch::tools::replay::{replay, ReplayLine};
use bandwatch::tools::send::{send, FrameMaker, SendOptions, WireFormat};
use bandwatch::tools::Endpoint;
use bandwatch::Pipeline;
use tokio::io::AsyncWriteExt;

fn free_tcp_port() -> u16 {
    let s = std::net::TcpListener::bind("127.0.0.1:0").expect("bind");
    s.local_addr().expect("addr").port()
}

fn config(port: u16) -> bandwatch::config::Config {
    let text = std::fs::read_to_string("config/examples/tcp-listen.toml")
        .expect("example config")
        .replace("127.0.0.1:7701", &format!("127.0.0.1:{port}"));
    match parse_str(&text) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    }
}

fn demo_bytes(frames: usize) -> Vec<u8> {
    let mut m = FrameMaker::new(
        2,
        WireFormat::Bwf1(SampleFormat::F32),
        256,
        1_700_000_000_000_000_000,
    );
    let mut out = Vec::new();
    for _ in 0..frames {
        m.next_frame(&mut out);
    }
    out
}

fn temp_file(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("bandwatch-test-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    dir.join(name)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn live_and_replay_agree_exactly() {
    let bytes = demo_bytes(300);
    let file = temp_file("live-vs-replay.bwf1");
    std::fs::write(&file, &bytes).expect("write");
    let port = free_tcp_port();
    let cfg = config(port);

    let mut out = Vec::new();
    let state = replay(&cfg, &file, None, &mut out).expect("replay");
    assert_eq!(state.frames.load(std::sync::atomic::Ordering::Relaxed), 300);
    let replayed: HashMap<(String, u64), ReplayLine> = String::from_utf8(out)
        .expect("utf8")
        .lines()
        .map(|l| serde_json::from_str::<ReplayLine>(l).expect("json line"))
        .map(|l| ((l.channel.clone(), l.first_sample), l))
        .collect();
    assert!(
        replayed.len() >= 3 * 5,
        "replay published {} spectra",
        replayed.len()
    );

    let p = Pipeline::start(&cfg).expect("pipeline");
    let mut c = loop {
        match tokio::net::TcpStream::connect(("127.0.0.1", port)).await {
            Ok(c) => break c,
            Err(_) => tokio::time::sleep(Duration::from_millis(20)).await,
        }
    };
    // Trickle the bytes in so the test sees many of the live snapshots.
    let mut matched = 0;
    let mut seen = HashMap::new();
    for chunk in bytes.chunks(3112 * 4) {
        c.write_all(chunk).await.expect("write");
        tokio::time::sleep(Duration::from_millis(3)).await;
        for ch in &p.state.channels {
            if let Some(s) = ch.latest() {
                seen.insert((ch.spec.name.clone(), s.first_sample), s);
            }
        }
    }
    let deadline = Instant::now() + Duration::from_secs(20);
    while p.state.channels.iter().any(|c| {
        c.counters
            .samples_processed
            .load(std::sync::atomic::Ordering::Relaxed)
            < 300 * 256
    }) {
        assert!(Instant::now() < deadline, "live pipeline did not finish");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    for ch in &p.state.channels {
        if let Some(s) = ch.latest() {
            seen.insert((ch.spec.name.clone(), s.first_sample), s);
        }
    }
    for ((name, first), snap) in &seen {
        let r = replayed
            .get(&(name.clone(), *first))
            .unwrap_or_else(|| panic!("live spectrum {name}@{first} missing from replay"));
        let live: Vec<Option<f64>> = snap
            .bands
            .iter()
            .map(|b| b.is_ok().then_some(b.value))
            .collect();
        let rep: Vec<Option<f64>> = r.bands.iter().map(|(_, v)| *v).collect();
        assert_eq!(live, rep, "{name}@{first}: band values differ");
        assert_eq!(snap.overall.rms, r.rms);
        matched += 1;
    }
    assert!(matched >= 6, "only {matched} live spectra compared");
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn record_keeps_the_stream_as_sent() {
    let port = free_tcp_port();
    let file = temp_file("recorded.bwf1");
    let rec_file = file.clone();
    let recorder = tokio::spawn(async move {
        bandwatch::tools::record::record(
            &Endpoint::TcpServe(format!("127.0.0.1:{port}")),
            &rec_file,
            Some(20.0),
            std::future::pending(),
        )
        .await
    });
    // Wait for the recorder's listener.
    let deadline = Instant::now() + Duration::from_secs(10);
    let report = loop {
        let opts = SendOptions {
            to: Endpoint::Tcp(format!("127.0.0.1:{port}")),
            format: WireFormat::Bwf1(SampleFormat::I24),
            rate_x: 20.0,
            seconds: Some(1.0),
            frame_samples: 256,
            seed: 2,
            faults: Default::default(),
        };
        match send(opts, std::future::pending()).await {
            Ok(r) => break r,
            Err(_) if Instant::now() < deadline => {
                tokio::time::sleep(Duration::from_millis(20)).await
            }
            Err(e) => panic!("send: {e}"),
        }
    };
    let rec = recorder.await.expect("join").expect("record");
    assert_eq!(rec.bytes, report.bytes);
    let bytes = std::fs::read(&file).expect("read");
    let mut d = bandwatch::frame::bwf1::StreamDecoder::new();
    d.push(&bytes);
    let mut frames = 0;
    while let Ok(Some(_)) = d.next_frame() {
        frames += 1;
    }
    assert_eq!(frames, report.frames);
    assert_eq!(d.stats().rejected_total(), 0);
}
