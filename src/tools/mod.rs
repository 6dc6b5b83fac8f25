//! Commands beside the daemon (the top layer; see DEVELOPERS.md, Layers):
//! `send` (a stand-in DAQ box playing the demo over BWF1 or lines), `record`
//! (store a raw stream as received), `replay` (run the pipeline over a
//! recorded stream as fast as the CPU allows), `selftest` (published check
//! values measured through the real code paths), `bench` (side-by-side
//! stage throughput, memory and latency) and `soak` (the real daemon as a
//! child process under faults and load, its counters balanced exactly at
//! the end). `replay`, `selftest` and `bench` build their pipelines with
//! `pipeline::Builder`, as the daemon does.

pub mod bench;
pub mod record;
pub mod replay;
pub mod selftest;
pub mod send;
pub mod soak;

/// Where `send` delivers or `record` takes bytes from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Endpoint {
    /// `tcp://HOST:PORT`: dial it.
    Tcp(String),
    /// `tcp-serve://HOST:PORT`: listen there and serve whoever connects
    /// (for a daemon configured as `tcp-connect`).
    TcpServe(String),
    /// `udp://HOST:PORT`: send to it, or (record) bind it.
    Udp(String),
    /// `serial:PATH`: a serial device or a pseudo-terminal.
    Serial(String),
}

impl std::str::FromStr for Endpoint {
    type Err = String;
    fn from_str(s: &str) -> Result<Endpoint, String> {
        if let Some(a) = s.strip_prefix("tcp://") {
            Ok(Endpoint::Tcp(a.to_string()))
        } else if let Some(a) = s.strip_prefix("tcp-serve://") {
            Ok(Endpoint::TcpServe(a.to_string()))
        } else if let Some(a) = s.strip_prefix("udp://") {
            Ok(Endpoint::Udp(a.to_string()))
        } else if let Some(p) = s.strip_prefix("serial:") {
            Ok(Endpoint::Serial(p.to_string()))
        } else {
            Err(format!(
                "{s:?}: expected tcp://HOST:PORT, tcp-serve://HOST:PORT, udp://HOST:PORT or serial:PATH"
            ))
        }
    }
}
