//! `bandwatch send`: plays the P2 pump scenario as a DAQ box would, as BWF1
//! frames (or `lines` text) over TCP, UDP or a serial line, in real time or
//! faster, optionally with injected faults for tests.
//!
//! Faults are counted by frame number n = 1, 2, 3 … (every Nth frame):
//! - drop: frame n is not sent (the receiver sees a gap of S instants);
//! - corrupt: one byte inside frame n's samples is flipped (the CRC fails);
//! - duplicate: frame n is sent twice;
//! - reorder: frame n is held back and sent after frame n + 1 (the
//!   receiver sees a gap of S instants, then a late frame).

use std::io::Write as _;
use std::time::Duration;

use tokio::io::AsyncWriteExt;
use tokio::net::{TcpListener, TcpStream, UdpSocket};
use tokio_serial::SerialPortBuilderExt;

use crate::clock::unix_now_ns;
use crate::config::SIM_SAMPLE_RATE_HZ;
use crate::frame::bwf1::{encode_into, Header};
use crate::frame::{SampleFormat, SampleSlice};
use crate::source::sim::{PumpSim, CHANNELS, SENSITIVITY_V_PER_G, TACH_INDEX, VOLTS_PER_COUNT};
use crate::tools::Endpoint;

/// Every Nth frame gets the fault; 0 = never.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct Faults {
    pub drop_every: u64,
    pub corrupt_every: u64,
    pub duplicate_every: u64,
    pub reorder_every: u64,
}

/// What goes on the wire.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WireFormat {
    /// BWF1 frames with samples of this format: f32 in g, or integer counts.
    Bwf1(SampleFormat),
    /// One text line per instant, values in g.
    Lines,
}

/// Makes the demo's frames, one after another.
pub struct FrameMaker {
    sim: PumpSim,
    format: WireFormat,
    frame_samples: usize,
    next_sample: u64,
    start_ns: u64,
    counts: Vec<i32>,
    scratch_f32: Vec<f32>,
    scratch_i16: Vec<i16>,
}

impl FrameMaker {
    pub fn new(seed: u64, format: WireFormat, frame_samples: usize, start_ns: u64) -> FrameMaker {
        FrameMaker {
            sim: PumpSim::new(SIM_SAMPLE_RATE_HZ, seed),
            format,
            frame_samples: frame_samples.clamp(1, 65_536),
            next_sample: 0,
            start_ns,
            counts: Vec::new(),
            scratch_f32: Vec::new(),
            scratch_i16: Vec::new(),
        }
    }

    pub fn frame_samples(&self) -> usize {
        self.frame_samples
    }

    /// Appends the next frame (all of its bytes) to `out`.
    pub fn next_frame(&mut self, out: &mut Vec<u8>) {
        let s = self.frame_samples;
        self.counts.resize(s * CHANNELS, 0);
        self.sim.fill_counts(&mut self.counts);
        let first = self.next_sample;
        self.next_sample += s as u64;
        // Values in units: g for the accelerometers, volts for the tach.
        let g_per_count = VOLTS_PER_COUNT / SENSITIVITY_V_PER_G;
        let unit_per_count = |c: usize| {
            if c % CHANNELS == TACH_INDEX {
                VOLTS_PER_COUNT
            } else {
                g_per_count
            }
        };
        match self.format {
            WireFormat::Lines => {
                for instant in self.counts.chunks_exact(CHANNELS) {
                    let mut sep = "";
                    for (i, &c) in instant.iter().enumerate() {
                        let v = (c as f64 * unit_per_count(i)) as f32;
                        let _ = write!(out, "{sep}{v}");
                        sep = ",";
                    }
                    out.push(b'\n');
                }
            }
            WireFormat::Bwf1(format) => {
                let ts = self.start_ns + (first as f64 * 1e9 / SIM_SAMPLE_RATE_HZ) as u64;
                let h = Header::new(
                    format,
                    CHANNELS as u16,
                    s as u32,
                    first,
                    ts,
                    SIM_SAMPLE_RATE_HZ,
                );
                let slice = match format {
                    SampleFormat::F32 | SampleFormat::F64 => {
                        self.scratch_f32.clear();
                        self.scratch_f32.extend(
                            self.counts
                                .iter()
                                .enumerate()
                                .map(|(i, &c)| (c as f64 * unit_per_count(i)) as f32),
                        );
                        SampleSlice::F32(&self.scratch_f32)
                    }
                    SampleFormat::I16 => {
                        // 16-bit converter: the top 16 of the 24 bits.
                        self.scratch_i16.clear();
                        self.scratch_i16
                            .extend(self.counts.iter().map(|&c| (c >> 8) as i16));
                        SampleSlice::I16(&self.scratch_i16)
                    }
                    SampleFormat::I24 | SampleFormat::I32 => SampleSlice::I32(&self.counts),
                };
                // F64 frames carry the f32 values widened.
                let r = if format == SampleFormat::F64 {
                    let wide: Vec<f64> = self.scratch_f32.iter().map(|&v| v as f64).collect();
                    encode_into(&h, SampleSlice::F64(&wide), out)
                } else {
                    encode_into(&h, slice, out)
                };
                debug_assert!(r.is_ok(), "the sender's own frames are valid: {r:?}");
            }
        }
    }
}

/// Turns the sequence of frames into what is sent, injecting faults.
#[derive(Debug, Default)]
pub struct FaultPlan {
    faults: Faults,
    n: u64,
    held: Option<Vec<u8>>,
    pub report: SendReport,
}

/// What `send` did, printed as JSON at the end.
#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize)]
pub struct SendReport {
    /// Frames made (including dropped ones).
    pub frames: u64,
    /// Instants per channel made.
    pub instants: u64,
    /// Bytes written to the transport.
    pub bytes: u64,
    pub dropped: u64,
    pub corrupted: u64,
    pub duplicated: u64,
    pub reordered: u64,
}

impl FaultPlan {
    pub fn new(faults: Faults) -> FaultPlan {
        FaultPlan {
            faults,
            ..FaultPlan::default()
        }
    }

    fn hits(every: u64, n: u64) -> bool {
        every > 0 && n.is_multiple_of(every)
    }

    /// Takes frame n (counted from 1) and returns the chunks to send now.
    pub fn apply(&mut self, mut frame: Vec<u8>, instants: u64) -> Vec<Vec<u8>> {
        self.n += 1;
        let n = self.n;
        self.report.frames += 1;
        self.report.instants += instants;
        let f = self.faults;
        if Self::hits(f.drop_every, n) {
            self.report.dropped += 1;
            return self.held.take().into_iter().collect();
        }
        if Self::hits(f.corrupt_every, n) && frame.len() > 40 {
            let at = 36 + (frame.len() - 40) / 2;
            frame[at] ^= 0x5A;
            self.report.corrupted += 1;
        }
        let mut out = Vec::new();
        if Self::hits(f.reorder_every, n) && self.held.is_none() {
            self.report.reordered += 1;
            self.held = Some(frame);
            return out;
        }
        let dup = Self::hits(f.duplicate_every, n);
        if dup {
            self.report.duplicated += 1;
            out.push(frame.clone());
        }
        out.push(frame);
        if let Some(h) = self.held.take() {
            out.push(h);
        }
        out
    }

    /// The held-back frame, if the stream ends with one.
    pub fn flush(&mut self) -> Option<Vec<u8>> {
        self.held.take()
    }
}

#[derive(Debug, thiserror::Error)]
pub enum SendError {
    #[error("cannot reach {target}: {source}")]
    Connect {
        target: String,
        #[source]
        source: std::io::Error,
    },
    #[error("write to {target} failed: {source}")]
    Write {
        target: String,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot open serial device {path}: {message}")]
    Serial { path: String, message: String },
    #[error("lines framing goes over a stream (tcp or serial), not UDP")]
    LinesOverUdp,
}

pub struct SendOptions {
    pub to: Endpoint,
    pub format: WireFormat,
    pub rate_x: f64,
    /// Seconds of signal to send; `None`: until interrupted.
    pub seconds: Option<f64>,
    pub frame_samples: usize,
    pub seed: u64,
    pub faults: Faults,
}

enum Link {
    Tcp(TcpStream),
    Udp(UdpSocket),
    Serial(tokio_serial::SerialStream),
}

impl Link {
    async fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        match self {
            Link::Tcp(s) => s.write_all(bytes).await,
            Link::Udp(s) => s.send(bytes).await.map(|_| ()),
            Link::Serial(s) => AsyncWriteExt::write_all(s, bytes).await,
        }
    }
    async fn flush(&mut self) -> std::io::Result<()> {
        match self {
            Link::Tcp(s) => s.flush().await,
            Link::Udp(_) => Ok(()),
            Link::Serial(s) => AsyncWriteExt::flush(s).await,
        }
    }
}

async fn open(to: &Endpoint, format: WireFormat) -> Result<Link, SendError> {
    let target = format!("{to:?}");
    let connect_err = |source| SendError::Connect {
        target: target.clone(),
        source,
    };
    Ok(match to {
        Endpoint::Tcp(a) => {
            let s = TcpStream::connect(a.as_str()).await.map_err(connect_err)?;
            let _ = s.set_nodelay(true);
            Link::Tcp(s)
        }
        Endpoint::TcpServe(a) => {
            let l = TcpListener::bind(a.as_str()).await.map_err(connect_err)?;
            tracing::info!(addr = %a, "waiting for the daemon to connect");
            let (s, peer) = l.accept().await.map_err(connect_err)?;
            tracing::info!(%peer, "daemon connected");
            Link::Tcp(s)
        }
        Endpoint::Udp(a) => {
            if format == WireFormat::Lines {
                return Err(SendError::LinesOverUdp);
            }
            let s = UdpSocket::bind(if a.starts_with('[') {
                "[::]:0"
            } else {
                "0.0.0.0:0"
            })
            .await
            .map_err(connect_err)?;
            s.connect(a.as_str()).await.map_err(connect_err)?;
            Link::Udp(s)
        }
        Endpoint::Serial(p) => {
            let port = tokio_serial::new(p.as_str(), 115_200)
                .open_native_async()
                .map_err(|e| SendError::Serial {
                    path: p.clone(),
                    message: e.to_string(),
                })?;
            Link::Serial(port)
        }
    })
}

/// Streams the demo until `seconds` of signal are sent or `stop` resolves.
pub async fn send<F>(opts: SendOptions, stop: F) -> Result<SendReport, SendError>
where
    F: std::future::Future<Output = ()>,
{
    let target = format!("{:?}", opts.to);
    let mut link = open(&opts.to, opts.format).await?;
    let mut maker = FrameMaker::new(opts.seed, opts.format, opts.frame_samples, unix_now_ns());
    let mut plan = FaultPlan::new(opts.faults);
    let fs = SIM_SAMPLE_RATE_HZ;
    let total = opts.seconds.map(|s| (s * fs).round() as u64);
    let s = maker.frame_samples() as u64;
    let start = tokio::time::Instant::now();
    let mut made: u64 = 0;
    let mut buf = Vec::new();
    let mut tick = tokio::time::interval(Duration::from_millis(5));
    tokio::pin!(stop);
    let write_err = |source| SendError::Write {
        target: target.clone(),
        source,
    };
    'outer: loop {
        tokio::select! {
            _ = tick.tick() => {}
            _ = &mut stop => break,
        }
        let due = (start.elapsed().as_secs_f64() * fs * opts.rate_x) as u64;
        while made + s <= due {
            if total.is_some_and(|t| made >= t) {
                break 'outer;
            }
            buf.clear();
            maker.next_frame(&mut buf);
            made += s;
            for chunk in plan.apply(std::mem::take(&mut buf), s) {
                link.send(&chunk).await.map_err(write_err)?;
                plan.report.bytes += chunk.len() as u64;
            }
        }
        if total.is_some_and(|t| made >= t) {
            break;
        }
    }
    if let Some(h) = plan.flush() {
        link.send(&h).await.map_err(write_err)?;
        plan.report.bytes += h.len() as u64;
    }
    link.flush().await.map_err(write_err)?;
    Ok(plan.report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn faults_follow_the_plan() {
        let mut p = FaultPlan::new(Faults {
            drop_every: 5,
            corrupt_every: 0,
            duplicate_every: 3,
            reorder_every: 7,
        });
        let mut sent = Vec::new();
        for n in 1..=10u8 {
            for c in p.apply(vec![n; 50], 1) {
                sent.push(c[0]);
            }
        }
        // 3 doubled, 5 and 10 dropped, 7 held back and sent after 8, 6 doubled.
        assert_eq!(sent, vec![1, 2, 3, 3, 4, 6, 6, 8, 7, 9, 9]);
        assert_eq!(p.report.dropped, 2);
        assert_eq!(p.report.duplicated, 3);
        assert_eq!(p.report.reordered, 1);
    }

    #[test]
    fn frames_decode_back_to_the_sim() {
        let mut m = FrameMaker::new(2, WireFormat::Bwf1(SampleFormat::F32), 256, 1);
        let mut bytes = Vec::new();
        m.next_frame(&mut bytes);
        m.next_frame(&mut bytes);
        let mut d = crate::frame::bwf1::StreamDecoder::new();
        d.push(&bytes);
        let a = d.next_frame().expect("ok").expect("frame");
        let b = d.next_frame().expect("ok").expect("frame");
        assert_eq!(a.header.first_sample, 0);
        assert_eq!(b.header.first_sample, 256);
        assert_eq!(a.header.channels as usize, CHANNELS);
    }
}
