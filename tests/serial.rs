//! Serial over a real pseudo-terminal pair: the daemon opens the slave side
//! by its path, the test plays the DAQ box on the master side.

use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

mod common;

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use bandwatch::frame::SampleFormat;
use bandwatch::tools::send::{FrameMaker, WireFormat};
use bandwatch::Pipeline;
use tokio::io::AsyncWriteExt;
use tokio_serial::SerialPort;

fn config(device: &str, framing: &str) -> bandwatch::config::Config {
    common::config(
        &Fixture::new()
            .source(
                Source::new("daq", "serial")
                    .set("device", quoted(device))
                    .set("baud", "115200")
                    .set("framing", quoted(framing))
                    .stream(4, 25_600)
                    .set("reopen_ms", "50"),
            )
            .channel(
                Channel::new("motor-de", "daq", 0)
                    .block(8192)
                    .overlap(0.5)
                    .no_averaging()
                    .band("1x", 21.0, 28.5),
            ),
    )
}

async fn wait_for(what: &str, secs: u64, mut ok: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(secs);
    while !ok() {
        assert!(Instant::now() < deadline, "timed out waiting for {what}");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

async fn run_over_pty(wire: WireFormat, framing: &str) {
    let (mut master, slave) = tokio_serial::SerialStream::pair().expect("pty pair");
    let path = slave.name().expect("slave path");
    // The daemon opens the slave by path; the test's own handle must not
    // hold it exclusively.
    drop(slave);
    let p = Pipeline::start(&config(&path, framing)).expect("pipeline");
    let s = p.state.sources[0].clone();
    wait_for("port open", 10, || s.is_connected()).await;
    let mut maker = FrameMaker::new(2, wire, 256, 1_000);
    let frames = 40u64;
    let mut bytes = Vec::new();
    for _ in 0..frames {
        maker.next_frame(&mut bytes);
    }
    master.write_all(&bytes).await.expect("write");
    master.flush().await.expect("flush");
    let ch = p.state.channels[0].clone();
    let expected = frames * 256;
    wait_for("samples", 20, || {
        ch.counters.samples_in.load(Ordering::Relaxed) == expected
    })
    .await;
    wait_for("spectrum", 10, || ch.latest().is_some()).await;
    let snap = ch.latest().expect("snapshot");
    // The sim's motor-de 1x is 2.2 mm/s RMS at 24.75 Hz: 0.0349 g RMS
    // (a = v·2πf, common practice). The band (three 3.125 Hz lines around
    // it) holds the Hann main lobe, so it reads the tone within a few %.
    let one_x = snap.bands[0].value;
    assert!((one_x - 0.0349).abs() < 0.003, "1x {one_x} g");
    assert_eq!(ch.counters.dropped_total(), 0);
    assert!(s.rejected().is_empty(), "{:?}", s.rejected());

    // Unplug: the master side goes away, the port vanishes.
    drop(master);
    wait_for("disconnected", 10, || !s.is_connected()).await;
    p.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn serial_bwf1_over_a_pty() {
    run_over_pty(WireFormat::Bwf1(SampleFormat::F32), "bwf1").await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn serial_lines_over_a_pty() {
    run_over_pty(WireFormat::Lines, "lines").await;
}
