//! The `serial` source: a serial line (RS-232/RS-485 or a USB adapter) read
//! with tokio-serial, BWF1, `lines` or `raw` framing. When the port
//! vanishes (adapter unplugged) the reader logs it once, shows the source as
//! disconnected and tries to reopen it every `reopen_ms`.

use std::sync::atomic::Ordering;
use std::time::Duration;

use tokio::io::AsyncReadExt;
use tokio::time::sleep;
use tokio_serial::SerialPortBuilderExt;

use crate::config::{FlowControl, Parity, SourceKind};
use crate::counters::GapReason;
use crate::source::framed::{FrameSink, StreamFraming};
use crate::source::SourceContext;

/// Runs a `serial` source until shutdown.
pub async fn run(ctx: SourceContext) {
    let SourceContext {
        spec,
        outputs,
        counters,
        mut shutdown,
    } = ctx;
    let SourceKind::Serial {
        device,
        baud,
        data_bits,
        parity,
        stop_bits,
        flow_control,
        stream,
        reopen_ms,
    } = &spec.kind
    else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a serial source");
        return;
    };
    let mut sink =
        FrameSink::new(outputs, counters, spec.sample_rate_hz).with_sequence(&spec.sequence);
    let mut framing = match StreamFraming::new(stream, sink.out.width()) {
        Ok(f) => f,
        Err(e) => {
            tracing::error!(source = %sink.state.name, error = %e, "cannot set up the decoder");
            return;
        }
    };
    let builder = tokio_serial::new(device.as_str(), *baud)
        .data_bits(match data_bits {
            5 => tokio_serial::DataBits::Five,
            6 => tokio_serial::DataBits::Six,
            7 => tokio_serial::DataBits::Seven,
            _ => tokio_serial::DataBits::Eight,
        })
        .parity(match parity {
            Parity::None => tokio_serial::Parity::None,
            Parity::Odd => tokio_serial::Parity::Odd,
            Parity::Even => tokio_serial::Parity::Even,
        })
        .stop_bits(if *stop_bits == 2 {
            tokio_serial::StopBits::Two
        } else {
            tokio_serial::StopBits::One
        })
        .flow_control(match flow_control {
            FlowControl::None => tokio_serial::FlowControl::None,
            FlowControl::Software => tokio_serial::FlowControl::Software,
            FlowControl::Hardware => tokio_serial::FlowControl::Hardware,
        });
    let mut buf = vec![0u8; 16 * 1024];
    let mut failing = false;
    loop {
        match builder.clone().open_native_async() {
            Ok(mut port) => {
                tracing::info!(source = %sink.state.name, %device, baud, "serial port open");
                failing = false;
                sink.state.connections.fetch_add(1, Ordering::Relaxed);
                sink.restart();
                sink.set_connected(true);
                let ended = loop {
                    let r = tokio::select! {
                        r = port.read(&mut buf) => r,
                        _ = shutdown.recv() => break None,
                    };
                    match r {
                        Ok(0) => break Some("port closed".to_string()),
                        Ok(n) => {
                            sink.state.bytes.fetch_add(n as u64, Ordering::Relaxed);
                            framing.feed(&buf[..n], &mut sink);
                            sink.out.wake();
                        }
                        Err(e) => break Some(e.to_string()),
                    }
                };
                sink.set_connected(false);
                framing.reset(&mut sink);
                sink.out.mark_discontinuity(GapReason::Restart);
                match ended {
                    None => return,
                    Some(why) => {
                        tracing::warn!(source = %sink.state.name, %device, reason = %why, "serial port lost; will reopen")
                    }
                }
            }
            Err(e) => {
                if !failing {
                    tracing::warn!(source = %sink.state.name, %device, error = %e, "cannot open serial port; retrying");
                    failing = true;
                }
            }
        }
        tokio::select! {
            biased;
            _ = shutdown.recv() => return,
            _ = sleep(Duration::from_millis(*reopen_ms)) => {}
        }
    }
}
