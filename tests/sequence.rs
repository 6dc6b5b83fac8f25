//! Sequence rules and header checks (README, "Sequence rules"), on real
//! sockets on 127.0.0.1: a DAQ box that restarts, a frame index far in the
//! future, an index at the end of the u64 space, and a header that
//! disagrees with the config. Every wait is bounded.

use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};

mod common;

use common::{free_tcp_port, free_udp_port, wait_for};

use bandwatch::config::fixture::{Channel, Fixture};
use bandwatch::counters::{ChannelCounters, GapReason, RestartReason, SourceCounters};
use bandwatch::frame::bwf1::{encode, Header};
use bandwatch::frame::{SampleFormat, SampleSlice};
use bandwatch::tools::send::{send, Faults, SendOptions, SendReport, WireFormat};
use bandwatch::tools::Endpoint;
use bandwatch::Pipeline;

const S: u64 = 256;
const RATE: f64 = 25_600.0;

/// Two P2 channels on one network source (4 channels, 25 600 Hz).
fn config_with(source: &str) -> bandwatch::config::Config {
    let p2 = |name: &str, index: usize| {
        Channel::new(name, "daq", index)
            .block(4096)
            .overlap(0.5)
            .no_averaging()
    };
    common::config(
        &Fixture::new()
            .raw("[dsp]\nworkers = 1\nring_seconds = 20")
            .raw(source)
            .channel(p2("motor-de", 0))
            .channel(p2("pump-de", 1)),
    )
}

fn udp_source(port: u16, extra: &str) -> String {
    format!("[[source]]\nname = \"daq\"\nkind = \"udp\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\n{extra}")
}

fn tcp_source(port: u16) -> String {
    format!("[[source]]\nname = \"daq\"\nkind = \"tcp-listen\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 4\nsample_rate_hz = 25600\n")
}

fn get(c: &std::sync::atomic::AtomicU64) -> u64 {
    c.load(Ordering::Relaxed)
}

fn frame(first: u64) -> Vec<u8> {
    let body: Vec<f32> = (0..4 * S).map(|i| (i as f32 * 0.01).sin()).collect();
    encode(
        &Header::new(SampleFormat::F32, 4, S as u32, first, 0, RATE),
        SampleSlice::F32(&body),
    )
    .expect("frame")
}

async fn send_frames(to: Endpoint, frames: u64, rate_x: f64) -> SendReport {
    let opts = SendOptions {
        to,
        format: WireFormat::Bwf1(SampleFormat::F32),
        rate_x,
        seconds: Some((frames * S) as f64 / RATE),
        frame_samples: S as usize,
        seed: 2,
        faults: Faults::default(),
    };
    send(opts, std::future::pending()).await.expect("send")
}

async fn udp_daemon(extra: &str) -> (u16, Pipeline) {
    let port = free_udp_port();
    let p = Pipeline::start(&config_with(&udp_source(port, extra))).expect("pipeline");
    wait_for("udp bind", 5, || {
        std::net::UdpSocket::bind(("127.0.0.1", port)).is_err()
    })
    .await;
    (port, p)
}

/// Every datagram the source has looked at: taken, late, or rejected.
fn seen(s: &SourceCounters) -> u64 {
    let rejected: u64 = s.rejected().iter().map(|(_, n)| n).sum();
    get(&s.frames) + get(&s.frames_late) + rejected
}

/// Every counter of a source and of its channels, in a fixed order, with
/// names, to check that none ever goes down.
fn all_counters(s: &SourceCounters, channels: &[Arc<ChannelCounters>]) -> Vec<(String, u64)> {
    let mut v = vec![
        ("frames".to_string(), get(&s.frames)),
        ("bytes".to_string(), get(&s.bytes)),
        ("connections".to_string(), get(&s.connections)),
        ("crc_errors".to_string(), get(&s.crc_errors)),
        ("resyncs".to_string(), get(&s.resyncs)),
        ("bytes_skipped".to_string(), get(&s.bytes_skipped)),
        ("samples_missing".to_string(), get(&s.samples_missing)),
        ("frames_late".to_string(), get(&s.frames_late)),
    ];
    for (k, n) in s.rejected() {
        v.push((format!("rejected {k}"), n));
    }
    for (i, c) in channels.iter().enumerate() {
        v.push((format!("ch{i} samples_in"), get(&c.samples_in)));
        v.push((
            format!("ch{i} samples_processed"),
            get(&c.samples_processed),
        ));
        v.push((format!("ch{i} blocks"), get(&c.blocks)));
        v.push((format!("ch{i} spectra"), get(&c.spectra)));
        for r in GapReason::ALL {
            v.push((format!("ch{i} dropped {}", r.as_str()), c.dropped(r)));
            v.push((
                format!("ch{i} discontinuities {}", r.as_str()),
                c.discontinuities(r),
            ));
        }
    }
    v
}

fn assert_monotonic(before: &[(String, u64)], after: &[(String, u64)], step: &str) {
    for (name, old) in before {
        let new = after.iter().find(|(k, _)| k == name).map_or(0, |(_, n)| *n);
        assert!(new >= *old, "{name} went down at {step}: {old} -> {new}");
    }
}

/// Finding 2 of issue 13: the DAQ box restarts and counts from 0 again.
/// Its frames must be taken again within a bounded number of frames, the
/// break counted as a restart, not as billions of missing samples.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_daq_restart_is_taken_again_and_counted_as_a_restart() {
    let (port, p) = udp_daemon("").await;
    let s = p.state.sources[0].clone();
    let first = send_frames(Endpoint::Udp(format!("127.0.0.1:{port}")), 200, 8.0).await;
    wait_for("first run", 10, || seen(&s) >= first.frames).await;
    assert_eq!(get(&s.frames), 200);
    let ch = &p.state.channels[0].counters;
    let restarts_before = ch.discontinuities(GapReason::Restart);
    let in_before = get(&ch.samples_in);
    // The box restarts: the same sender, from index 0 again.
    let second = send_frames(Endpoint::Udp(format!("127.0.0.1:{port}")), 100, 8.0).await;
    wait_for("second run seen", 10, || {
        seen(&s) >= first.frames + second.frames
    })
    .await;
    assert_eq!(
        get(&s.frames),
        300,
        "every frame after the restart is taken (late: {})",
        get(&s.frames_late)
    );
    assert_eq!(get(&s.frames_late), 0);
    assert_eq!(get(&s.samples_missing), 0, "a restart is not a gap");
    assert_eq!(get(&ch.samples_in) - in_before, 100 * S);
    assert_eq!(
        ch.discontinuities(GapReason::Restart),
        restarts_before + 1,
        "the restart breaks the blocks and averages once"
    );
    assert_eq!(s.restarts(RestartReason::BackwardJump), 1);
    assert_eq!(ch.dropped(GapReason::Restart), 0, "nothing refused");
    p.stop().await;
}

/// A box that restarts after less than the reorder window (1 s by
/// default): its first frames look late; the third in a row that follows
/// on from the one before starts the new sequence, the two before it are
/// counted per channel as dropped for the restart.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_daq_restart_within_the_reorder_window_is_taken_from_its_third_frame() {
    let (port, p) = udp_daemon("").await;
    let s = p.state.sources[0].clone();
    let sock = std::net::UdpSocket::bind("127.0.0.1:0").expect("bind");
    let mut sent = 0;
    for run in [20, 30] {
        for i in 0..run {
            sock.send_to(&frame(i * S), ("127.0.0.1", port))
                .expect("send");
            sent += 1;
            std::thread::sleep(Duration::from_micros(300));
        }
    }
    wait_for("every datagram", 10, || seen(&s) >= sent).await;
    assert_eq!(get(&s.frames), 20 + 28);
    assert_eq!(get(&s.frames_late), 2);
    assert_eq!(get(&s.samples_missing), 0);
    assert_eq!(s.restarts(RestartReason::BackwardJump), 1);
    for ch in &p.state.channels {
        let c = &ch.counters;
        assert_eq!(c.dropped(GapReason::Restart), 2 * S);
        assert_eq!(
            get(&c.samples_in) + c.dropped_total(),
            50 * S,
            "instants sent = received + dropped by reason"
        );
    }
    p.stop().await;
}

/// Finding 2 of issue 13: one valid datagram with first_sample = 2^62 in
/// the middle of a stream.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_one_datagram_far_ahead_neither_counts_missing_nor_locks_out() {
    let (port, p) = udp_daemon("").await;
    let s = p.state.sources[0].clone();
    let sock = std::net::UdpSocket::bind("127.0.0.1:0").expect("bind");
    let mut sent = 0;
    for i in 0..50 {
        sock.send_to(&frame(i * S), ("127.0.0.1", port))
            .expect("send");
        sent += 1;
        std::thread::sleep(Duration::from_micros(300));
    }
    sock.send_to(&frame(1 << 62), ("127.0.0.1", port))
        .expect("send");
    sent += 1;
    for i in 50..100 {
        sock.send_to(&frame(i * S), ("127.0.0.1", port))
            .expect("send");
        sent += 1;
        std::thread::sleep(Duration::from_micros(300));
    }
    wait_for("every datagram", 10, || seen(&s) >= sent).await;
    assert!(
        get(&s.samples_missing) < 100 * S,
        "missing_samples {} for one stray frame",
        get(&s.samples_missing)
    );
    assert_eq!(get(&s.samples_missing), 0);
    assert_eq!(get(&s.frames_late), 0, "the frames after it are not late");
    assert_eq!(get(&s.frames), 101);
    let ch = &p.state.channels[0].counters;
    assert_eq!(get(&ch.samples_in), 101 * S);
    assert_eq!(s.restarts(RestartReason::ForwardJump), 1);
    assert_eq!(s.restarts(RestartReason::BackwardJump), 1);
    p.stop().await;
}

/// Finding 3 of issue 13: frames 0…99, one at 2^64 − 128 (S = 256: it
/// would run past the end of the index space), then 0…199. Every counter
/// is sampled between the steps and must never go down; the samples after
/// the wrap are taken.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_index_wrap_keeps_every_counter_monotonic() {
    use tokio::io::AsyncWriteExt;
    let port = free_tcp_port();
    let p = Pipeline::start(&config_with(&tcp_source(port))).expect("pipeline");
    let s = p.state.sources[0].clone();
    let chans: Vec<_> = p
        .state
        .channels
        .iter()
        .map(|c| c.counters.clone())
        .collect();
    let mut c = loop {
        match tokio::net::TcpStream::connect(("127.0.0.1", port)).await {
            Ok(c) => break c,
            Err(_) => tokio::time::sleep(Duration::from_millis(20)).await,
        }
    };
    let mut written = 0u64;
    let mut steps = vec![("start", all_counters(&s, &chans))];
    for i in 0..100 {
        let f = frame(i * S);
        c.write_all(&f).await.expect("write");
        written += f.len() as u64;
    }
    wait_for("frames 0..99", 10, || get(&s.frames) == 100).await;
    steps.push(("after 0..99", all_counters(&s, &chans)));
    let f = frame(u64::MAX - 127);
    c.write_all(&f).await.expect("write");
    written += f.len() as u64;
    wait_for("wrap frame read", 10, || get(&s.bytes) == written).await;
    tokio::time::sleep(Duration::from_millis(100)).await;
    steps.push(("after the wrap frame", all_counters(&s, &chans)));
    let in_before = get(&chans[0].samples_in);
    for i in 0..200 {
        let f = frame(i * S);
        c.write_all(&f).await.expect("write");
        written += f.len() as u64;
        if i == 99 {
            wait_for("half of 0..199 read", 10, || get(&s.bytes) == written).await;
            steps.push(("after 0..99 again", all_counters(&s, &chans)));
        }
    }
    wait_for("0..199 taken", 10, || {
        get(&chans[0].samples_in) >= in_before + 200 * S
    })
    .await;
    steps.push(("after 0..199", all_counters(&s, &chans)));
    for w in steps.windows(2) {
        assert_monotonic(&w[0].1, &w[1].1, w[1].0);
    }
    assert_eq!(get(&chans[0].samples_in) - in_before, 200 * S);
    assert_eq!(get(&s.samples_missing), 0);
    assert_eq!(s.restarts(RestartReason::IndexWrap), 1);
    for c in &chans {
        assert_eq!(c.dropped(GapReason::Restart), S, "the wrapping frame");
        assert_eq!(get(&c.samples_in) + c.dropped_total(), 301 * S);
    }
    drop(c);
    p.stop().await;
}

/// Finding 5 of issue 13: a header that announces 63 channels x 65 536
/// f32 samples (16.5 MB, under `max_frame_bytes`) on a 4-channel source,
/// then one at the wrong rate, each followed at once by good frames and no
/// body. Both are refused from the header, the decoder resynchronises,
/// and the good frames are taken without waiting for a phantom body.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_header_that_disagrees_with_the_config_is_refused_before_its_body() {
    use tokio::io::AsyncWriteExt;
    let port = free_tcp_port();
    let p = Pipeline::start(&config_with(&tcp_source(port))).expect("pipeline");
    let s = p.state.sources[0].clone();
    let mut c = loop {
        match tokio::net::TcpStream::connect(("127.0.0.1", port)).await {
            Ok(c) => break c,
            Err(_) => tokio::time::sleep(Duration::from_millis(20)).await,
        }
    };
    let t0 = Instant::now();
    let mut next = 0;
    let bad_headers = [
        Header::new(SampleFormat::F32, 63, 65_536, 10 * S, 0, RATE),
        Header::new(SampleFormat::F32, 4, 65_536, 20 * S, 0, 48_000.0),
    ];
    assert!(
        bad_headers[0].frame_bytes() < 16 << 20,
        "under the default limit"
    );
    for bad in &bad_headers {
        for _ in 0..10 {
            c.write_all(&frame(next * S)).await.expect("write");
            next += 1;
        }
        let mut h = Vec::new();
        bad.write_to(&mut h);
        c.write_all(&h).await.expect("write");
    }
    for _ in 0..10 {
        c.write_all(&frame(next * S)).await.expect("write");
        next += 1;
    }
    c.flush().await.expect("flush");
    wait_for("the good frames after the bad headers", 5, || {
        get(&s.frames) == 30
    })
    .await;
    assert!(t0.elapsed() < Duration::from_secs(5));
    let rejected = s.rejected();
    assert!(
        rejected.contains(&("channel_count_mismatch", 1)),
        "{rejected:?}"
    );
    assert!(
        rejected.contains(&("sample_rate_mismatch", 1)),
        "{rejected:?}"
    );
    assert_eq!(get(&s.resyncs), 2);
    assert_eq!(
        get(&s.bytes_skipped),
        2 * 36,
        "the two headers, nothing more"
    );
    assert_eq!(get(&s.samples_missing), 0);
    drop(c);
    p.stop().await;
}

/// Finding 7 of issue 13: a datagram that is not taken as a frame counts
/// its bytes in `skipped_bytes` (bad CRC, wrong channel count or rate,
/// longer than `max_datagram_bytes`), and a sequence gap counts its
/// instants in each channel's `samples_dropped{reason="sequence_gap"}`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn udp_skipped_datagrams_and_gaps_are_counted_per_source_and_channel() {
    let (port, p) = udp_daemon("max_datagram_bytes = 5000\n").await;
    let s = p.state.sources[0].clone();
    let sock = std::net::UdpSocket::bind("127.0.0.1:0").expect("bind");
    let mut skipped = 0u64;
    let mut datagrams = Vec::new();
    for i in 0..20u64 {
        let mut f = frame(i * S);
        match i {
            3 => {
                f[100] ^= 0x55; // CRC mismatch
                skipped += f.len() as u64;
            }
            7 | 8 => continue, // lost in transit: a gap of 2 frames
            11 => {
                f = encode(
                    &Header::new(SampleFormat::F32, 2, S as u32, i * S, 0, RATE),
                    SampleSlice::F32(&vec![0.0; 2 * S as usize]),
                )
                .expect("frame");
                skipped += f.len() as u64;
            }
            13 => {
                f = encode(
                    &Header::new(SampleFormat::F32, 4, 8, i * S, 0, 48_000.0),
                    SampleSlice::F32(&[0.0; 32]),
                )
                .expect("frame");
                skipped += f.len() as u64;
            }
            _ => {}
        }
        datagrams.push(f);
    }
    // Longer than max_datagram_bytes: the reader's buffer holds one byte
    // more than the limit, so that is what it receives and counts.
    let oversize = vec![0u8; 6000];
    skipped += 5001;
    let total: u64 = datagrams.iter().map(|d| d.len() as u64).sum::<u64>() + 5001;
    datagrams.push(oversize);
    for d in &datagrams {
        sock.send_to(d, ("127.0.0.1", port)).expect("send");
        std::thread::sleep(Duration::from_micros(300));
    }
    wait_for("every datagram", 10, || seen(&s) >= datagrams.len() as u64).await;
    assert_eq!(get(&s.bytes), total);
    assert_eq!(get(&s.bytes_skipped), skipped);
    assert_eq!(get(&s.frames), 15);
    // 3 (bad CRC), 7, 8, 11, 13: five frames' instants not received, seen
    // as four gaps (3, 7-8, 11, 13) when the next good frame arrives.
    assert_eq!(get(&s.samples_missing), 5 * S);
    for ch in &p.state.channels {
        let c = &ch.counters;
        assert_eq!(c.dropped(GapReason::SequenceGap), 5 * S, "{}", ch.spec.name);
        assert_eq!(c.discontinuities(GapReason::SequenceGap), 4);
        assert_eq!(
            get(&c.samples_in) + c.dropped_total(),
            20 * S,
            "instants sent = received + dropped by reason"
        );
    }
    p.stop().await;
}
