//! TCP sources against peers that stop talking, over real sockets on
//! 127.0.0.1 (issue: "an idle TCP peer holds the only slot"): a peer that
//! connects and sends nothing, or a DAQ box that stops mid-stream and
//! leaves its socket open, must not keep the real box out. Every wait is
//! bounded.

use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

mod common;

use common::{free_tcp_port, wait_for};

use bandwatch::config::fixture::{Channel, Fixture};
use bandwatch::counters::SourceCounters;
use bandwatch::frame::bwf1::{encode, Header};
use bandwatch::frame::{SampleFormat, SampleSlice};
use bandwatch::Pipeline;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

const S: u64 = 256;

fn config(source: &str) -> bandwatch::config::Config {
    common::config(
        &Fixture::new()
            .raw("[dsp]\nworkers = 1")
            .raw(source)
            .channel(
                Channel::new("motor-de", "daq", 0)
                    .block(1024)
                    .no_averaging(),
            ),
    )
}

fn listen_source(port: u16, extra: &str) -> String {
    format!(
        "[[source]]\nname = \"daq\"\nkind = \"tcp-listen\"\nlisten = \"127.0.0.1:{port}\"\nchannels = 1\nsample_rate_hz = 25600\n{extra}"
    )
}

fn rejected(s: &SourceCounters, reason: &str) -> u64 {
    s.rejected()
        .iter()
        .find(|(r, _)| *r == reason)
        .map_or(0, |(_, n)| *n)
}

fn frame(first: u64) -> Vec<u8> {
    let body = vec![0.1f32; S as usize];
    encode(
        &Header::new(SampleFormat::F32, 1, S as u32, first, 0, 25_600.0),
        SampleSlice::F32(&body),
    )
    .expect("frame")
}

async fn connect(port: u16) -> TcpStream {
    let deadline = Instant::now() + Duration::from_secs(5);
    loop {
        match TcpStream::connect(("127.0.0.1", port)).await {
            Ok(c) => return c,
            Err(e) => {
                assert!(Instant::now() < deadline, "cannot connect: {e}");
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
        }
    }
}

/// True once the server has closed `s` (EOF or reset) within `within`.
async fn closed_within(s: &mut TcpStream, within: Duration) -> bool {
    let mut b = [0u8; 64];
    matches!(
        tokio::time::timeout(within, s.read(&mut b)).await,
        Ok(Ok(0)) | Ok(Err(_))
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_silent_peer_is_closed_and_the_daq_box_gets_in() {
    let port = free_tcp_port();
    let cfg = config(&listen_source(
        port,
        "on_second_connection = \"refuse\"\nidle_timeout_s = 0.5\n",
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = p.state.sources[0].clone();
    // A peer that connects and says nothing takes the slot ...
    let mut squatter = connect(port).await;
    wait_for("squatter connected", 5, || s.is_connected()).await;
    // ... until the idle timeout closes it.
    assert!(
        closed_within(&mut squatter, Duration::from_secs(5)).await,
        "silent peer still connected after 5 s"
    );
    wait_for("idle_timeout counted", 5, || {
        rejected(&s, "idle_timeout") == 1
    })
    .await;
    // The real box now connects and streams.
    let mut daq = connect(port).await;
    for f in 0..8 {
        daq.write_all(&frame(f * S)).await.expect("write");
    }
    let ch = p.state.channels[0].clone();
    wait_for("samples accepted", 5, || {
        ch.counters.samples_in.load(Ordering::Relaxed) == 8 * S
    })
    .await;
    assert_eq!(rejected(&s, "second_connection"), 0);
    drop(daq);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn replace_silent_lets_a_restarted_box_in_at_once() {
    let port = free_tcp_port();
    // The idle timeout is long: only the silence rule can let B in quickly.
    let cfg = config(&listen_source(
        port,
        "on_second_connection = \"replace-silent\"\nreplace_after_silent_s = 0.3\nidle_timeout_s = 60\n",
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = p.state.sources[0].clone();
    let ch = p.state.channels[0].clone();
    // Box A streams, then stops without closing (power lost, half-open).
    let mut a = connect(port).await;
    for f in 0..4 {
        a.write_all(&frame(f * S)).await.expect("write");
    }
    wait_for("A's samples", 5, || {
        ch.counters.samples_in.load(Ordering::Relaxed) == 4 * S
    })
    .await;
    // While A is still talking, a newcomer is refused.
    let mut early = connect(port).await;
    a.write_all(&frame(4 * S)).await.expect("write");
    assert!(
        closed_within(&mut early, Duration::from_secs(5)).await,
        "a newcomer replaced a talking peer"
    );
    wait_for("refusal counted", 5, || {
        rejected(&s, "second_connection") == 1
    })
    .await;
    // A falls silent; after 0.3 s the restarted box B takes over at once.
    tokio::time::sleep(Duration::from_millis(500)).await;
    let started = Instant::now();
    let mut b = connect(port).await;
    for f in 0..4 {
        b.write_all(&frame(f * S)).await.expect("write");
    }
    wait_for("B's samples", 5, || {
        ch.counters.samples_in.load(Ordering::Relaxed) == 9 * S
    })
    .await;
    assert!(started.elapsed() < Duration::from_secs(5));
    assert!(
        closed_within(&mut a, Duration::from_secs(5)).await,
        "A was not closed when B replaced it"
    );
    assert_eq!(s.connections.load(Ordering::Relaxed), 2);
    drop(b);
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tcp_connect_drops_a_silent_link_and_dials_again() {
    let daq = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let port = daq.local_addr().expect("addr").port();
    let cfg = config(&format!(
        "[[source]]\nname = \"daq\"\nkind = \"tcp-connect\"\naddress = \"127.0.0.1:{port}\"\nchannels = 1\nsample_rate_hz = 25600\nreconnect_min_ms = 20\nreconnect_max_ms = 200\nidle_timeout_s = 0.5\n"
    ));
    let p = Pipeline::start(&cfg).expect("pipeline");
    let s = p.state.sources[0].clone();
    // The box accepts and then says nothing.
    let (mut first, _) = tokio::time::timeout(Duration::from_secs(10), daq.accept())
        .await
        .expect("daemon dials in time")
        .expect("accept");
    assert!(
        closed_within(&mut first, Duration::from_secs(5)).await,
        "silent link kept open"
    );
    // bandwatch dials again by itself.
    let (mut second, _) = tokio::time::timeout(Duration::from_secs(10), daq.accept())
        .await
        .expect("daemon dials again")
        .expect("accept");
    second.write_all(&frame(0)).await.expect("write");
    wait_for("frame after redial", 5, || {
        s.frames.load(Ordering::Relaxed) == 1
    })
    .await;
    assert!(rejected(&s, "idle_timeout") >= 1);
    p.stop().await;
}

#[test]
fn idle_settings_out_of_range_are_refused() {
    for extra in ["idle_timeout_s = 0", "replace_after_silent_s = -1"] {
        let text = Fixture::new()
            .raw(&listen_source(9, extra))
            .channel(Channel::new("c", "daq", 0))
            .toml();
        match bandwatch::config::parse_str(&text) {
            Err(bandwatch::config::ParseError::Invalid(v)) => {
                let key = extra.split(' ').next().unwrap_or_default();
                assert!(v.iter().any(|i| i.path.ends_with(key)), "{extra}: {v:?}");
            }
            other => panic!("{extra}: {other:?}"),
        }
    }
}
