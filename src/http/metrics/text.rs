//! The direct text encoder of `/metrics`: a [`Sink`] of the walk that
//! writes each sample straight into per-family text buffers (reused from
//! scrape to scrape) with label sets escaped once, when the collector is
//! built, then joins the families in name order with the static ones the
//! prometheus crate encoded.

use std::fmt::Write as _;
use std::sync::{Arc, Mutex};

use prometheus::proto::MetricType;

use super::families::FIXED;
use super::lock;
use super::walk::{walk, Fam, Labels, Layout, Sink, LEVELS, RECORD_KINDS};
use crate::http::projection::ChannelReach;
use crate::pipeline::state::AppState;

/// lines.
#[derive(Debug, Clone)]
struct FamilyText {
    name: String,
    head: String,
}

impl FamilyText {
    fn new(name: String, help: &str, kind: MetricType) -> FamilyText {
        let mut head = String::new();
        if !help.is_empty() {
            head.push_str("# HELP ");
            head.push_str(&name);
            head.push(' ');
            push_escaped(&mut head, help, false);
            head.push('\n');
        }
        head.push_str("# TYPE ");
        head.push_str(&name);
        head.push_str(match kind {
            MetricType::COUNTER => " counter\n",
            MetricType::GAUGE => " gauge\n",
            MetricType::SUMMARY => " summary\n",
            MetricType::HISTOGRAM => " histogram\n",
            MetricType::UNTYPED => " untyped\n",
        });
        FamilyText { name, head }
    }
}

/// Appends `v` escaped as the text format says: a backslash as `\\`, a
/// line feed as `\n`, and, in label values (`quote`), a double quote as
/// `\"`. Everything else is written as it is (UTF-8).
pub fn push_escaped(out: &mut String, v: &str, quote: bool) {
    let mut rest = v;
    while let Some(p) = rest.find(|c| c == '\\' || c == '\n' || (quote && c == '"')) {
        out.push_str(&rest[..p]);
        out.push_str(match rest.as_bytes()[p] {
            b'\\' => "\\\\",
            b'\n' => "\\n",
            _ => "\\\"",
        });
        rest = &rest[p + 1..];
    }
    out.push_str(rest);
}

/// `{name="value",…}` with the values escaped; empty for no labels.
fn label_set(pairs: &[(&str, &str)]) -> String {
    if pairs.is_empty() {
        return String::new();
    }
    let mut s = String::from("{");
    for (k, (name, value)) in pairs.iter().enumerate() {
        if k > 0 {
            s.push(',');
        }
        s.push_str(name);
        s.push_str("=\"");
        push_escaped(&mut s, value, true);
        s.push('"');
    }
    s.push('}');
    s
}

/// Integers below 2^53 are exact in an f64 and print the same either way.
const EXACT: f64 = 9_007_199_254_740_992.0;

fn push_uint(out: &mut String, mut v: u64) {
    let mut buf = [0u8; 20];
    let mut i = buf.len();
    loop {
        i -= 1;
        buf[i] = b'0' + (v % 10) as u8;
        v /= 10;
        if v == 0 {
            break;
        }
    }
    out.push_str(std::str::from_utf8(&buf[i..]).unwrap_or("0"));
}

/// Appends a sample value as the text format wants it: `NaN`, `+Inf`,
/// `-Inf`; finite values as Rust's `Display` prints an `f64` (shortest
/// digits that read back exactly, never an exponent), which is what the
/// prometheus crate's encoder wrote. Integral values below 2^53 take a
/// short path with the same digits.
pub fn push_value(out: &mut String, v: f64) {
    if v.is_nan() {
        out.push_str("NaN");
    } else if v.is_infinite() {
        out.push_str(if v > 0.0 { "+Inf" } else { "-Inf" });
    } else if v.trunc() == v && v.abs() < EXACT && v != 0.0 {
        if v < 0.0 {
            out.push('-');
        }
        push_uint(out, v.abs() as u64);
    } else if v == 0.0 {
        out.push_str(if v.is_sign_negative() { "-0" } else { "0" });
    } else {
        let _ = write!(out, "{v}");
    }
}

/// A counter value: as the f64 it used to be converted to.
fn push_count(out: &mut String, v: u64) {
    if (v as f64) < EXACT {
        push_uint(out, v);
    } else {
        push_value(out, v as f64);
    }
}

fn put_f(out: &mut String, name: &str, labels: &str, v: f64) {
    out.push_str(name);
    out.push_str(labels);
    out.push(' ');
    push_value(out, v);
    out.push('\n');
}

fn put_u(out: &mut String, name: &str, labels: &str, v: u64) {
    out.push_str(name);
    out.push_str(labels);
    out.push(' ');
    push_count(out, v);
    out.push('\n');
}

/// One channel's label sets, escaped once.
struct ChannelText {
    /// `{channel="…"}`
    ch: String,
    /// `{channel="…",reason="…"}`, in the order of `Layout::reasons`.
    reasons: Vec<String>,
    /// Per band: `{channel="…",band="…"}`.
    band: Vec<String>,
    /// Per alarm: `{channel="…",band="…"}`.
    alarm: Vec<String>,
    /// Per alarm: `{…,to="…"}` in the order of `Layout::states`.
    to: Vec<Vec<String>>,
    /// Per alarm: `{…,level="alert"}`, `{…,level="danger"}`.
    level: Vec<[String; 2]>,
}

/// Writes every channel- and source-derived family at scrape time.
pub struct PipelineCollector {
    app: Arc<AppState>,
    clock: fn() -> u64,
    layout: Layout,
    /// Heads of the fixed (0..FIXED.len()) and dynamic (FIXED.len()..)
    /// families.
    heads: Vec<FamilyText>,
    channels: Vec<ChannelText>,
    /// Per source: `{source="…"}` and `{source="…",kind="…"}`.
    sources: Vec<(String, String)>,
    /// Per machine: `{machine="…",source="…"}`.
    machines: Vec<String>,
    /// `{kind="…"}` for each of `RECORD_KINDS`.
    kinds: [String; 3],
    /// Indices into `heads` by family name.
    family_order: Vec<usize>,
    /// One text buffer per family, kept from scrape to scrape.
    bufs: Mutex<Vec<String>>,
    /// When each channel's alarms reach their limits, refreshed a few
    /// channels per scrape.
    reach: Mutex<ReachCache>,
}

/// Longest a channel's time to limit is reused before it is computed
/// again, s: a scrape shows it at most this old (the gauge itself counts
/// down to the scrape's time).
pub const REACH_MAX_AGE_S: f64 = 30.0;

/// Most time one scrape spends computing times to limit: the rest wait
/// for the next scrape (round-robin), so a large installation's scrape
/// stays fast and every channel is reached within a few scrapes.
pub const REACH_BUDGET: std::time::Duration = std::time::Duration::from_millis(20);

/// The times to limit of every channel and where the last refresh
/// stopped.
#[derive(Default)]
struct ReachCache {
    channels: Vec<ChannelReach>,
    next: usize,
}

impl ReachCache {
    /// Computes the channels whose answer is older than
    /// [`REACH_MAX_AGE_S`] (or missing), from where the last refresh
    /// stopped, until [`REACH_BUDGET`] is spent.
    fn refresh(&mut self, app: &AppState, now_s: f64) {
        let n = app.channels.len();
        self.channels.resize_with(n, ChannelReach::default);
        let t0 = std::time::Instant::now();
        for k in 0..n {
            let i = (self.next + k) % n;
            let ch = &app.channels[i];
            let r = &mut self.channels[i];
            let fresh = r.computed_s > 0.0 && (now_s - r.computed_s).abs() < REACH_MAX_AGE_S;
            if fresh || ch.spec.alarms.is_empty() {
                continue;
            }
            *r = crate::http::projection::channel_reach_in(app.history.as_deref(), ch, now_s);
            if t0.elapsed() >= REACH_BUDGET {
                self.next = (i + 1) % n;
                return;
            }
        }
    }
}

impl PipelineCollector {
    pub fn new(app: Arc<AppState>, clock: fn() -> u64) -> PipelineCollector {
        let layout = Layout::new(&app);
        let channels = app
            .channels
            .iter()
            .map(|ch| {
                let spec = &ch.spec;
                let name = spec.name.as_str();
                let alarm = |a: &str, extra: Option<(&str, &str)>| match extra {
                    Some(e) => label_set(&[("channel", name), ("band", a), e]),
                    None => label_set(&[("channel", name), ("band", a)]),
                };
                ChannelText {
                    ch: label_set(&[("channel", name)]),
                    reasons: layout
                        .reasons
                        .iter()
                        .map(|r| label_set(&[("channel", name), ("reason", r.as_str())]))
                        .collect(),
                    band: spec.bands.iter().map(|b| alarm(&b.name, None)).collect(),
                    alarm: spec.alarms.iter().map(|a| alarm(&a.name, None)).collect(),
                    to: spec
                        .alarms
                        .iter()
                        .map(|a| {
                            layout
                                .states
                                .iter()
                                .map(|&k| {
                                    let s = crate::alarm::state::AlarmState::ALL[k].as_str();
                                    alarm(&a.name, Some(("to", s)))
                                })
                                .collect()
                        })
                        .collect(),
                    level: spec
                        .alarms
                        .iter()
                        .map(|a| LEVELS.map(|l| alarm(&a.name, Some(("level", l)))))
                        .collect(),
                }
            })
            .collect();
        let heads: Vec<FamilyText> = layout
            .families()
            .map(|f| {
                let (name, help, kind, _) = layout.family(f);
                FamilyText::new(name.to_string(), help, kind)
            })
            .collect();
        let mut family_order: Vec<usize> = (0..heads.len()).collect();
        family_order.sort_by(|&a, &b| heads[a].name.cmp(&heads[b].name));
        let sources = app
            .sources
            .iter()
            .map(|s| {
                (
                    label_set(&[("source", &s.name)]),
                    label_set(&[("source", &s.name), ("kind", s.kind)]),
                )
            })
            .collect();
        let machines = app
            .machines
            .iter()
            .map(|m| label_set(&[("machine", &m.spec.name), ("method", m.spec.speed.as_str())]))
            .collect();
        let bufs = vec![String::new(); heads.len()];
        PipelineCollector {
            app,
            clock,
            layout,
            heads,
            channels,
            sources,
            machines,
            kinds: RECORD_KINDS.map(|k| label_set(&[("kind", k)])),
            family_order,
            bufs: Mutex::new(bufs),
            reach: Mutex::new(ReachCache::default()),
        }
    }

    /// The state this collector's label sets were made for.
    pub(crate) fn app(&self) -> &Arc<AppState> {
        &self.app
    }

    /// Writes the whole exposition: this collector's families and
    /// `statics` (name and encoded text of each static family, in name
    /// order), all in name order.
    pub(super) fn encode(&self, statics: &[(String, Vec<u8>)]) -> Vec<u8> {
        let now_ns = (self.clock)();
        let mut guard = lock(&self.bufs);
        let bufs: &mut Vec<String> = &mut guard;
        for b in bufs.iter_mut() {
            b.clear();
        }
        let mut reach = lock(&self.reach);
        reach.refresh(&self.app, now_ns as f64 * 1e-9);
        walk(
            &self.app,
            &self.layout,
            now_ns,
            &reach.channels,
            &mut TextSink { c: self, bufs },
        );

        // Families in name order, the static ones merged in.
        let total: usize = self
            .family_order
            .iter()
            .filter(|&&i| !bufs[i].is_empty())
            .map(|&i| self.heads[i].head.len() + bufs[i].len())
            .sum::<usize>()
            + statics.iter().map(|(_, t)| t.len()).sum::<usize>();
        let mut out = Vec::with_capacity(total);
        let mut st = statics.iter().peekable();
        for &i in &self.family_order {
            let h = &self.heads[i];
            while let Some((_, text)) = st.next_if(|(name, _)| name.as_str() < h.name.as_str()) {
                out.extend_from_slice(text);
            }
            if !bufs[i].is_empty() {
                out.extend_from_slice(h.head.as_bytes());
                out.extend_from_slice(bufs[i].as_bytes());
            }
        }
        for (_, text) in st {
            out.extend_from_slice(text);
        }
        out
    }

    /// The escaped label set of a sample, escaped in advance; `None` for
    /// a source's rejection reasons, which are not known in advance.
    #[inline]
    fn labels(&self, l: Labels<'_>) -> Option<&str> {
        Some(match l {
            Labels::None => "",
            Labels::Channel(i) => &self.channels[i].ch,
            Labels::Reason(i, k) => &self.channels[i].reasons[k],
            Labels::Band(i, j) => &self.channels[i].band[j],
            Labels::Alarm(i, j) => &self.channels[i].alarm[j],
            Labels::To(i, j, k) => &self.channels[i].to[j][k],
            Labels::Level(i, j, k) => &self.channels[i].level[j][k],
            Labels::Source(k) => &self.sources[k].0,
            Labels::SourceKind(k) => &self.sources[k].1,
            Labels::Machine(k) => &self.machines[k],
            Labels::Kind(k) => &self.kinds[k],
            Labels::Rejected(..) | Labels::Word(..) => return None,
        })
    }

    /// The label set of a rejection reason, escaped now.
    fn rejected(&self, l: Labels<'_>) -> String {
        match l {
            Labels::Rejected(k, reason) => {
                label_set(&[("source", &self.app.sources[k].name), ("reason", reason)])
            }
            Labels::Word(name, value) => label_set(&[(name, value)]),
            _ => String::new(),
        }
    }

    /// Index into `heads` and `bufs`.
    #[inline]
    fn slot(f: Fam) -> usize {
        match f {
            Fam::Fixed(f) => f as usize,
            Fam::Dyn(s) => FIXED.len() + s,
        }
    }
}

/// The walk's samples, written as text lines into the family buffers.
struct TextSink<'a> {
    c: &'a PipelineCollector,
    bufs: &'a mut [String],
}

impl Sink for TextSink<'_> {
    #[inline]
    fn gauge(&mut self, fam: Fam, labels: Labels<'_>, v: f64) {
        let i = PipelineCollector::slot(fam);
        let name = &self.c.heads[i].name;
        match self.c.labels(labels) {
            Some(l) => put_f(&mut self.bufs[i], name, l, v),
            None => put_f(&mut self.bufs[i], name, &self.c.rejected(labels), v),
        }
    }

    #[inline]
    fn counter(&mut self, fam: Fam, labels: Labels<'_>, v: u64) {
        let i = PipelineCollector::slot(fam);
        let name = &self.c.heads[i].name;
        match self.c.labels(labels) {
            Some(l) => put_u(&mut self.bufs[i], name, l, v),
            None => put_u(&mut self.bufs[i], name, &self.c.rejected(labels), v),
        }
    }
}
