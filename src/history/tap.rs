//! A channel's tap into the history, on its DSP worker: after every
//! publish it adds the overall levels and band values to the running
//! interval (count, min, sum, max, last and the worst alarm state per
//! series: no allocation), and when the interval ends it hands the finished
//! aggregates to the writer's queue. It also says when a spectrum is due
//! (every `spectrum_every_s` of publish time).
//!
//! Handing over never waits: `try_send` on the bounded queue. A record the
//! queue cannot take is counted (`queue_full`) and remembered as a hole,
//! which travels with the channel's next record that gets through.

use std::sync::atomic::Ordering;
use std::sync::mpsc::{SyncSender, TrySendError};
use std::sync::Arc;

use super::schema::OVERALL_SERIES;
use super::{
    Aggregate, DropReason, HistoryShared, IntervalRecord, Lost, Record, SpectrumRecord, StoreReason,
};
use crate::config::ChannelSpec;
use crate::dsp::bands::BandValue;
use crate::dsp::stats::Overall;

fn overall_value(o: &Overall, i: usize) -> f64 {
    match i {
        0 => o.rms,
        1 => o.peak,
        2 => o.peak_to_peak,
        3 => o.crest_factor,
        _ => o.mean,
    }
}

/// One channel's side of the history (see the module comment).
pub struct Tap {
    spec: Arc<ChannelSpec>,
    enbw_bins: f64,
    shared: Arc<HistoryShared>,
    tx: SyncSender<Record>,
    /// Start of the running interval, Unix seconds (None before the first
    /// result).
    start_s: Option<u64>,
    series: Vec<Aggregate>,
    /// The alarm state of each series at the latest result, set by the
    /// worker before `push` (None: no alarm on it).
    states: Vec<Option<i8>>,
    /// The spectrum timer's slot (publish second / every).
    spectrum_slot: Option<u64>,
    lost: Option<Lost>,
}

impl Tap {
    pub(crate) fn new(
        spec: Arc<ChannelSpec>,
        enbw_bins: f64,
        shared: Arc<HistoryShared>,
        tx: SyncSender<Record>,
    ) -> Tap {
        let n = OVERALL_SERIES.len() + spec.bands.len();
        Tap {
            spec,
            enbw_bins,
            shared,
            tx,
            start_s: None,
            series: vec![Aggregate::default(); n],
            states: vec![None; n],
            spectrum_slot: None,
            lost: None,
        }
    }

    /// The channel spec the tap writes under (a reload that changes only
    /// limits gives the worker a new one).
    pub fn set_spec(&mut self, spec: Arc<ChannelSpec>) {
        if spec.bands.len() == self.spec.bands.len() {
            self.spec = spec;
        }
    }

    /// Each series' alarm state at the coming result: index as in
    /// `IntervalRecord::series`. The worker sets them before [`Tap::push`].
    pub fn states_mut(&mut self) -> &mut [Option<i8>] {
        &mut self.states
    }

    /// Index of the series an overall alarm or band watches.
    pub fn overall_index(name: &str) -> Option<usize> {
        OVERALL_SERIES.iter().position(|s| *s == name)
    }

    /// Adds one published result at `published_s` (Unix seconds); hands
    /// over the previous interval when this result starts a new one.
    pub fn push(&mut self, published_s: u64, overall: &Overall, bands: &[BandValue]) {
        let span = u64::from(self.shared.spec.interval_s);
        let start = published_s - published_s % span;
        match self.start_s {
            Some(s) if s == start => {}
            Some(s) if start < s => {
                // The wall clock stepped back: the running interval goes
                // as it is and a new one starts.
                self.flush();
                self.start_s = Some(start);
            }
            Some(_) => {
                self.flush();
                self.start_s = Some(start);
            }
            None => self.start_s = Some(start),
        }
        let n_overall = OVERALL_SERIES.len();
        for i in 0..n_overall {
            self.series[i].add(overall_value(overall, i), self.states[i]);
        }
        for (k, b) in bands.iter().enumerate() {
            if let Some(a) = self.series.get_mut(n_overall + k) {
                let v = if b.is_ok() { b.value } else { f64::NAN };
                a.add(v, self.states[n_overall + k]);
            }
        }
    }

    /// Hands over the running interval (at its end, or when the channel
    /// stops). Nothing happens when it holds no result.
    pub fn flush(&mut self) {
        let Some(start) = self.start_s.take() else {
            return;
        };
        if self.series.iter().all(|a| a.n == 0 && a.n_bad == 0) {
            return;
        }
        let series = self.series.clone();
        for a in &mut self.series {
            *a = Aggregate::default();
        }
        let rec = IntervalRecord {
            spec: self.spec.clone(),
            t_s: start,
            span_s: self.shared.spec.interval_s,
            series,
            lost: self.lost,
        };
        let span = u64::from(self.shared.spec.interval_s);
        self.send(Record::Interval(Box::new(rec)), start, start + span);
    }

    /// Whether the spectrum timer says to store this result's spectrum.
    pub fn spectrum_due(&mut self, published_s: u64) -> bool {
        let every = u64::from(self.shared.spec.spectrum_every_s);
        if every == 0 {
            return false;
        }
        let slot = published_s / every;
        if self.spectrum_slot == Some(slot) {
            return false;
        }
        self.spectrum_slot = Some(slot);
        true
    }

    /// Hands a spectrum to the writer. `fill` copies the published result
    /// into the record (done only when the queue has room for it).
    pub fn store_spectrum(
        &mut self,
        reason: StoreReason,
        event: Option<String>,
        published_ns: u64,
        fill: impl FnOnce(&mut SpectrumRecord),
    ) {
        let mut rec = SpectrumRecord {
            spec: self.spec.clone(),
            enbw_bins: self.enbw_bins,
            reason,
            event,
            t_ns: 0,
            published_ns,
            averages: 0,
            first_sample: 0,
            oldest_first_sample: 0,
            speed_hz: None,
            power: Vec::new(),
            envelope: Vec::new(),
            bands: Vec::new(),
            lost: self.lost,
        };
        fill(&mut rec);
        let s = published_ns / 1_000_000_000;
        self.send(Record::Spectrum(Box::new(rec)), s, s + 1);
    }

    fn send(&mut self, rec: Record, from_s: u64, to_s: u64) {
        let c = &self.shared.counters;
        c.queued.fetch_add(1, Ordering::Relaxed);
        match self.tx.try_send(rec) {
            Ok(()) => self.lost = None,
            Err(TrySendError::Full(_) | TrySendError::Disconnected(_)) => {
                c.queued.fetch_sub(1, Ordering::Relaxed);
                c.add_dropped(DropReason::QueueFull, 1);
                self.lost = Some(match self.lost {
                    None => Lost {
                        from_s,
                        to_s,
                        records: 1,
                    },
                    Some(l) => Lost {
                        from_s: l.from_s.min(from_s),
                        to_s: l.to_s.max(to_s),
                        records: l.records + 1,
                    },
                });
            }
        }
    }
}

impl Drop for Tap {
    fn drop(&mut self) {
        self.flush();
    }
}
