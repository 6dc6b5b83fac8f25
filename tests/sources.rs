//! Real sockets on 127.0.0.1: the readers against `send`'s stand-in DAQ
//! box, with injected faults counted exactly.

use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::Duration;

mod common;

use common::{free_tcp_port, free_udp_port, wait_for};

use bandwatch::config::fixture::{Channel, Fixture};
use bandwatch::counters::SourceCounters;
use bandwatch::frame::bwf1::{encode, Header};
use bandwatch::frame::{SampleFormat, SampleSlice};
use bandwatch::pipeline::state::AppState;
use bandwatch::tools::send::{send, Faults, SendOptions, SendReport, WireFormat};
use bandwatch::tools::Endpoint;
use bandwatch::Pipeline;

const S: u64 = 256;

/// The P2 channels on one network source, samples in g (f32 BWF1).
fn config_with(source: &str) -> bandwatch::config::Config {
    let p2 = |name: &str, index: usize| {
        Channel::new(name, "daq", index)
            .block(4096)
            .overlap(0.5)
            .no_averaging()
    };
    common::config(
        &Fixture::new()
            .raw("[dsp]\nworkers = 1")
            .raw(source)
            .channel(p2("motor-de", 0))
            .channel(p2("pump-de", 1)),
    )
}

fn udp_source(port: u16) -> String {
    format!("[[source]]\nname = \"daq\"\nkind = \"udp\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\n")
}

fn get(c: &std::sync::atomic::AtomicU64) -> u64 {
    c.load(Ordering::Relaxed)
}

fn src(state: &AppState) -> Arc<SourceCounters> {
    state.sources[0].clone()
}

async fn send_frames(to: Endpoint, frames: u64, faults: Faults, rate_x: f64) -> SendReport {
    let opts = SendOptions {
        to,
        format: WireFormat::Bwf1(SampleFormat::F32),
        rate_x,
        seconds: Some((frames * S) as f64 / 25_600.0),
        frame_samples: S as usize,
        seed: 2,
        faults,
    };
    send(opts, std::future::pending()).await.expect("send")
}

/// Starts a UDP daemon, sends 100 frames with `faults`, waits until the
/// source has seen every datagram it was sent.
async fn udp_run(faults: Faults) -> (SendReport, Arc<SourceCounters>, Pipeline) {
    let port = free_udp_port();
    let p = Pipeline::start(&config_with(&udp_source(port))).expect("pipeline");
    let state = src(&p.state);
    // Give the reader a moment to bind before the first datagram.
    wait_for("udp bind", 5, || {
        std::net::UdpSocket::bind(("127.0.0.1", port)).is_err()
    })
    .await;
    let report = send_frames(Endpoint::Udp(format!("127.0.0.1:{port}")), 100, faults, 2.0).await;
    // Every datagram sent is either a good frame, a late one, or rejected.
    let datagrams = report.frames - report.dropped + report.duplicated;
    wait_for("all datagrams", 10, || {
        let rejected: u64 = state.rejected().iter().map(|(_, n)| n).sum();
        get(&state.frames) + get(&state.frames_late) + rejected >= datagrams
    })
    .await;
    assert_eq!(get(&state.bytes), report.bytes, "every byte sent arrived");
    (report, state, p)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_dropped_datagrams_are_counted_as_missing_samples() {
    let (r, s, p) = udp_run(Faults {
        drop_every: 10,
        ..Faults::default()
    })
    .await;
    // Frames 10, 20, … 100 are not sent; the last one leaves no visible gap.
    assert_eq!(r.dropped, 10);
    assert_eq!(get(&s.samples_missing), 9 * S);
    assert_eq!(get(&s.frames), 90);
    assert_eq!(get(&s.frames_late), 0);
    let ch = &p.state.channels[0];
    assert_eq!(
        ch.counters
            .discontinuities(bandwatch::counters::GapReason::SequenceGap),
        9,
        "each gap breaks the block"
    );
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_duplicates_are_dropped_and_counted() {
    let (r, s, p) = udp_run(Faults {
        duplicate_every: 7,
        ..Faults::default()
    })
    .await;
    assert_eq!(r.duplicated, 14);
    assert_eq!(get(&s.frames_late), 14);
    assert_eq!(get(&s.frames), 100);
    assert_eq!(get(&s.samples_missing), 0);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_reordered_datagrams_are_a_gap_then_late() {
    let (r, s, p) = udp_run(Faults {
        reorder_every: 13,
        ..Faults::default()
    })
    .await;
    // 13, 26, … 91 each arrive after their successor.
    assert_eq!(r.reordered, 7);
    assert_eq!(get(&s.frames_late), 7);
    assert_eq!(get(&s.samples_missing), 7 * S);
    assert_eq!(get(&s.frames), 93);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_corrupt_datagrams_fail_their_crc() {
    let (r, s, p) = udp_run(Faults {
        corrupt_every: 9,
        ..Faults::default()
    })
    .await;
    assert_eq!(r.corrupted, 11);
    assert_eq!(get(&s.crc_errors), 11);
    assert_eq!(s.rejected(), vec![("crc_mismatch", 11)]);
    assert_eq!(get(&s.samples_missing), 11 * S);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_frame_with_wrong_channel_count_or_rate_is_rejected() {
    let port = free_udp_port();
    let p = Pipeline::start(&config_with(&udp_source(port))).expect("pipeline");
    let s = src(&p.state);
    let sock = std::net::UdpSocket::bind("127.0.0.1:0").expect("bind");
    let two = encode(
        &Header::new(SampleFormat::F32, 2, 4, 0, 0, 25_600.0),
        SampleSlice::F32(&[0.0; 8]),
    )
    .expect("frame");
    let rate = encode(
        &Header::new(SampleFormat::F32, 4, 4, 0, 0, 48_000.0),
        SampleSlice::F32(&[0.0; 16]),
    )
    .expect("frame");
    wait_for("rejections", 10, || {
        let _ = sock.send_to(&two, ("127.0.0.1", port));
        let _ = sock.send_to(&rate, ("127.0.0.1", port));
        let r = s.rejected();
        r.iter().any(|(k, _)| *k == "channel_count_mismatch")
            && r.iter().any(|(k, _)| *k == "sample_rate_mismatch")
    })
    .await;
    assert_eq!(get(&s.frames), 0, "neither frame reached a ring");
    assert_eq!(
        p.state.channels[0]
            .counters
            .samples_in
            .load(Ordering::Relaxed),
        0
    );
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_listen_counts_crc_errors_and_resyncs() {
    let port = free_tcp_port();
    let cfg = config_with(&format!(
        "[[source]]\nname = \"daq\"\nkind = \"tcp-listen\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\n"
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = src(&p.state);
    wait_for("listener", 5, || {
        std::net::TcpStream::connect(("127.0.0.1", port)).is_ok()
    })
    .await;
    // The probe connection above came and went (accepted, then closed).
    wait_for("probe closed", 5, || {
        get(&s.connections) >= 1 && !s.is_connected()
    })
    .await;
    let r = send_frames(
        Endpoint::Tcp(format!("127.0.0.1:{port}")),
        100,
        Faults {
            corrupt_every: 9,
            ..Faults::default()
        },
        4.0,
    )
    .await;
    assert_eq!(r.corrupted, 11);
    wait_for("all bytes", 10, || get(&s.bytes) >= r.bytes).await;
    wait_for("frames", 10, || get(&s.frames) == 89).await;
    assert_eq!(get(&s.crc_errors), 11);
    assert_eq!(get(&s.resyncs), 11);
    assert_eq!(get(&s.samples_missing), 11 * S);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_sender_that_dies_mid_frame_and_comes_back() {
    use tokio::io::AsyncWriteExt;
    let port = free_tcp_port();
    let cfg = config_with(&format!(
        "[[source]]\nname = \"daq\"\nkind = \"tcp-listen\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\n"
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = src(&p.state);
    let h = |first| Header::new(SampleFormat::F32, 4, S as u32, first, 0, 25_600.0);
    let body = vec![0.25f32; 4 * S as usize];
    let f0 = encode(&h(0), SampleSlice::F32(&body)).expect("frame");
    let f1 = encode(&h(S), SampleSlice::F32(&body)).expect("frame");
    let mut c = loop {
        match tokio::net::TcpStream::connect(("127.0.0.1", port)).await {
            Ok(c) => break c,
            Err(_) => tokio::time::sleep(Duration::from_millis(20)).await,
        }
    };
    c.write_all(&f0).await.expect("write");
    c.write_all(&f1[..100]).await.expect("write");
    c.flush().await.expect("flush");
    wait_for("first frame", 10, || {
        get(&s.frames) == 1 && get(&s.bytes) as usize == f0.len() + 100
    })
    .await;
    drop(c);
    wait_for("disconnect", 10, || !s.is_connected()).await;
    assert_eq!(
        get(&s.bytes_skipped),
        100,
        "the partial frame is counted, not used"
    );
    let mut c = tokio::net::TcpStream::connect(("127.0.0.1", port))
        .await
        .expect("reconnect");
    c.write_all(&f1).await.expect("write");
    c.flush().await.expect("flush");
    wait_for("second frame", 10, || get(&s.frames) == 2).await;
    assert_eq!(get(&s.connections), 2);
    let ch = &p.state.channels[0];
    assert!(
        ch.counters
            .discontinuities(bandwatch::counters::GapReason::Restart)
            >= 2
    );
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_listen_refuses_a_second_connection() {
    let port = free_tcp_port();
    let cfg = config_with(&format!(
        "[[source]]\nname = \"daq\"\nkind = \"tcp-listen\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\non_second_connection = \"refuse\"\n"
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = src(&p.state);
    let first = loop {
        match tokio::net::TcpStream::connect(("127.0.0.1", port)).await {
            Ok(c) => break c,
            Err(_) => tokio::time::sleep(Duration::from_millis(20)).await,
        }
    };
    wait_for("first connected", 5, || s.is_connected()).await;
    let _second = tokio::net::TcpStream::connect(("127.0.0.1", port))
        .await
        .expect("connect");
    wait_for("refusal", 5, || {
        s.rejected().contains(&("second_connection", 1))
    })
    .await;
    assert!(s.is_connected(), "the first connection stays");
    drop(first);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_connect_reconnects_after_the_daq_drops() {
    use tokio::io::AsyncWriteExt;
    let daq = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let port = daq.local_addr().expect("addr").port();
    let cfg = config_with(&format!(
        "[[source]]\nname = \"daq\"\nkind = \"tcp-connect\"\naddress = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\nreconnect_min_ms = 20\nreconnect_max_ms = 200\n"
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = src(&p.state);
    let body = vec![0.1f32; 4 * S as usize];
    for round in 0..2u64 {
        let (mut c, _) = tokio::time::timeout(Duration::from_secs(10), daq.accept())
            .await
            .expect("daemon dials in time")
            .expect("accept");
        let f = encode(
            &Header::new(SampleFormat::F32, 4, S as u32, 0, 0, 25_600.0),
            SampleSlice::F32(&body),
        )
        .expect("frame");
        c.write_all(&f).await.expect("write");
        wait_for("frame", 10, || get(&s.frames) == round + 1).await;
        drop(c);
    }
    assert_eq!(get(&s.connections), 2);
    p.stop().await;
}
