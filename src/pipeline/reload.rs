//! Config reload (README "Reloading the config"): the running pipeline
//! compared with a new, validated config, and changed in place.
//!
//! A channel's *signal settings* are every key of its `[[channel]]` table
//! except the alarm limits (each level's `limit`, baseline rule or `zone`
//! preset). A channel whose table is unchanged is *kept*; one whose limits
//! alone changed is *changed* (new limits apply at the next value, nothing
//! else is touched); any other change *restarts* it (new ring and DSP;
//! counters carry on, latches are carried over from its alarm board).
//! What cannot change while running is refused as a problem ("needs a
//! restart") and nothing is applied.

use std::collections::BTreeMap;
use std::sync::Arc;

use serde::Serialize;

use crate::alarm::state::{AlarmMemory, AlarmState, Severity};
use crate::config::{ChannelSpec, Config, ConfigError};

/// Re-reads the config file (built by the daemon's caller, next to where
/// the config was first loaded).
pub type ConfigLoader = Arc<dyn Fn() -> Result<Config, ConfigError> + Send + Sync>;

/// One problem that kept a reload out, with the config field at fault.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Problem {
    pub path: String,
    pub message: String,
}

/// Why a reload was not applied; the old config runs on.
#[derive(Debug, thiserror::Error)]
pub enum ReloadError {
    #[error("config reload refused, old config kept: {}", join(.0))]
    Refused(Vec<Problem>),
}

impl ReloadError {
    pub fn problems(&self) -> &[Problem] {
        match self {
            ReloadError::Refused(p) => p,
        }
    }

    /// The problems of a config that did not load.
    pub fn from_config(e: &ConfigError) -> ReloadError {
        let problems = match e {
            ConfigError::Invalid { issues, .. } => issues
                .iter()
                .map(|i| Problem {
                    path: i.path.clone(),
                    message: i.message.clone(),
                })
                .collect(),
            ConfigError::Io { path, source } => vec![Problem {
                path: path.display().to_string(),
                message: format!("cannot read: {source}"),
            }],
            ConfigError::Parse { path, message } => vec![Problem {
                path: path.display().to_string(),
                message: message.clone(),
            }],
        };
        ReloadError::Refused(problems)
    }
}

fn join(p: &[Problem]) -> String {
    p.iter()
        .map(|p| format!("{}: {}", p.path, p.message))
        .collect::<Vec<_>>()
        .join("; ")
}

/// What a reload did, by name.
#[derive(Debug, Clone, Default, PartialEq, Serialize, utoipa::ToSchema)]
pub struct ReloadSummary {
    pub kept: Vec<String>,
    /// Limits changed, everything else kept.
    pub changed: Vec<String>,
    pub restarted: Vec<String>,
    pub added: Vec<String>,
    pub removed: Vec<String>,
    pub sources_restarted: Vec<String>,
    pub sources_added: Vec<String>,
    pub sources_removed: Vec<String>,
}

/// A reload asked of the daemon (SIGHUP or `POST /api/v1/reload`), and
/// where to answer.
pub struct ReloadRequest {
    /// "SIGHUP" or "http".
    pub origin: &'static str,
    pub reply: Option<tokio::sync::oneshot::Sender<Result<ReloadSummary, ReloadError>>>,
}

/// How one channel of the new config relates to the running one.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum ChannelFate {
    Kept,
    Changed,
    Restarted,
    Added,
}

/// The comparison of the running config with a new one.
pub(crate) struct Plan {
    /// Per channel of the new config, in its order.
    pub fates: Vec<ChannelFate>,
    /// Channels of the old config not in the new one.
    pub removed: Vec<String>,
}

/// Specs compare by their full `Debug` text: every field (floats printed
/// exactly, round-trip) without deriving `PartialEq` through the whole
/// config vocabulary.
fn same<T: std::fmt::Debug>(a: &T, b: &T) -> bool {
    format!("{a:?}") == format!("{b:?}")
}

/// Whether `new` differs from `old` only in alarm limits.
fn limits_only(old: &ChannelSpec, new: &ChannelSpec) -> bool {
    if old.alarms.len() != new.alarms.len() {
        return false;
    }
    let mut n = new.clone();
    for (a, o) in n.alarms.iter_mut().zip(&old.alarms) {
        for (level, was) in [
            (&mut a.spec.alert, &o.spec.alert),
            (&mut a.spec.danger, &o.spec.danger),
        ] {
            if let (Some(l), Some(w)) = (level.as_mut(), was) {
                l.source = w.source;
            }
        }
        a.spec.zone = o.spec.zone;
    }
    same(old, &n)
}

/// Compares the running config with `new`: the fate of each channel, or
/// every change that needs a restart.
pub(crate) fn plan(old: &Config, new: &Config) -> Result<Plan, Vec<Problem>> {
    let mut problems = Vec::new();
    let mut restart = |path: &str, what: &str| {
        problems.push(Problem {
            path: path.to_string(),
            message: format!(
                "{what} changed: needs a restart (not applied; the old value runs on)"
            ),
        });
    };
    if old.listen != new.listen {
        restart("server.listen", "the listen address");
    }
    if old.http != new.http {
        restart("server", "the HTTP limits");
    }
    if old.trend_seconds != new.trend_seconds {
        restart("server.trend_seconds", "the trend length");
    }
    if !same(&old.web, &new.web) {
        restart("server.web_config", "TLS or basic auth");
    }
    if old.history != new.history {
        restart("history", "the history settings");
    }
    if old.workers != new.workers {
        restart("dsp.workers", "the worker count");
    }
    if old.ring_seconds.to_bits() != new.ring_seconds.to_bits() {
        restart("dsp.ring_seconds", "the ring length");
    }
    if !same(&old.alarms, &new.alarms) {
        restart(
            "alarms",
            "the [alarms] table (storage, journal, captures, token)",
        );
    }
    if !same(&old.machines, &new.machines) {
        restart("machine", "a machine");
    }
    let old_by: BTreeMap<&str, &ChannelSpec> =
        old.channels.iter().map(|c| (c.name.as_str(), c)).collect();
    let new_names: std::collections::BTreeSet<&str> =
        new.channels.iter().map(|c| c.name.as_str()).collect();
    // Channels that measure a machine's speed feed every follower's order
    // bands: they change with a restart only.
    let measuring: Vec<&str> = old
        .machines
        .iter()
        .filter_map(|m| match &m.speed {
            crate::config::SpeedSource::Tach { channel, .. }
            | crate::config::SpeedSource::Peak { channel, .. } => Some(channel.as_str()),
            crate::config::SpeedSource::Fixed { .. } => None,
        })
        .collect();
    let mut fates = Vec::new();
    for c in &new.channels {
        let fate = match old_by.get(c.name.as_str()) {
            None => ChannelFate::Added,
            Some(o) if same(*o, c) => ChannelFate::Kept,
            Some(o) if limits_only(o, c) => ChannelFate::Changed,
            Some(_) => ChannelFate::Restarted,
        };
        if fate == ChannelFate::Restarted && measuring.contains(&c.name.as_str()) {
            problems.push(Problem {
                path: format!("channel {:?}", c.name),
                message:
                    "measures a machine's speed; a change to its signal settings needs a restart"
                        .into(),
            });
        }
        fates.push(fate);
    }
    let removed: Vec<String> = old
        .channels
        .iter()
        .filter(|c| !new_names.contains(c.name.as_str()))
        .map(|c| c.name.clone())
        .collect();
    for r in &removed {
        if measuring.contains(&r.as_str()) {
            problems.push(Problem {
                path: format!("channel {r:?}"),
                message: "measures a machine's speed; removing it needs a restart".into(),
            });
        }
    }
    if problems.is_empty() {
        Ok(Plan { fates, removed })
    } else {
        Err(problems)
    }
}

/// The latch of alarm `band` as a channel's board showed it (carried over
/// when a reload restarts the channel).
pub(crate) fn memory_from_board(
    board: Option<&crate::alarm::engine::AlarmBoard>,
    spec: &ChannelSpec,
    band: &str,
) -> Option<AlarmMemory> {
    let board = board?;
    let j = spec.alarms.iter().position(|a| a.name == band)?;
    let v = board.alarms.get(j)?;
    if !v.latched {
        return None;
    }
    let latched = match v.state {
        AlarmState::Danger => Severity::Danger,
        AlarmState::Alert => Severity::Alert,
        // Latched while inhibited or back to normal: at least alert.
        AlarmState::Normal | AlarmState::Inhibited => Severity::Alert,
    };
    Some(AlarmMemory {
        latched,
        acknowledged: v.acknowledged,
    })
}

/// Waits for a command's answer, bounded (a worker takes one within one
/// idle park, 20 ms; a removed channel first drains its ring).
async fn answered(rx: Option<tokio::sync::oneshot::Receiver<bool>>, what: &str) {
    let ok = match rx {
        Some(rx) => matches!(
            tokio::time::timeout(std::time::Duration::from_secs(10), rx).await,
            Ok(Ok(true))
        ),
        None => false,
    };
    if !ok {
        tracing::error!(what, "a DSP worker did not apply a reload command");
    }
}

impl super::Pipeline {
    /// The config in force.
    pub fn config(&self) -> &Config {
        &self.config
    }

    /// Applies `new` (validated) to the running pipeline: see the module
    /// docs. On `Err` nothing was changed. Counted in the state's
    /// [`ReloadStats`](super::state::ReloadStats) and logged as one line
    /// either way.
    pub async fn reload(&mut self, new: &Config) -> Result<ReloadSummary, ReloadError> {
        let result = self.apply(new).await;
        let stats = self.live.load().reloads.clone();
        stats.record(result.is_ok());
        match &result {
            Ok(s) => tracing::info!(
                kept = s.kept.len(),
                changed = s.changed.len(),
                restarted = s.restarted.len(),
                added = s.added.len(),
                removed = s.removed.len(),
                changed_names = ?s.changed,
                restarted_names = ?s.restarted,
                added_names = ?s.added,
                removed_names = ?s.removed,
                sources_restarted = ?s.sources_restarted,
                sources_added = ?s.sources_added,
                sources_removed = ?s.sources_removed,
                "config reloaded"
            ),
            Err(e) => {
                tracing::error!(problems = %join(e.problems()), "config reload refused; the old config runs on")
            }
        }
        result
    }

    /// Counts and logs a reload whose config did not load (parse or
    /// validation problems): nothing was changed.
    pub fn refused(&self, e: &ReloadError) {
        self.live.load().reloads.record(false);
        tracing::error!(problems = %join(e.problems()), "config reload refused; the old config runs on");
    }

    async fn apply(&mut self, new: &Config) -> Result<ReloadSummary, ReloadError> {
        use super::state::{AppState, ChannelShared};
        use super::worker::{ChannelDsp, WorkerCommand};
        use super::{input_of, RingSize, RunningSource};
        use crate::ring::try_channel_ring;
        use crate::source::ChannelInput;

        let plan = plan(&self.config, new).map_err(ReloadError::Refused)?;
        let old_state = self.live.load_full();
        let Some(workers) = self.workers.as_mut() else {
            return Err(ReloadError::Refused(vec![Problem {
                path: "config".into(),
                message: "the pipeline is stopping".into(),
            }]));
        };
        let mut summary = ReloadSummary::default();

        // 1. Everything that can fail, before anything changes: the rings
        // and DSP of added and restarted channels.
        let mut built: Vec<(
            usize,
            Arc<ChannelShared>,
            ChannelDsp,
            crate::ring::RingWriter,
        )> = Vec::new();
        let mut problems = Vec::new();
        for (i, (spec, fate)) in new.channels.iter().zip(&plan.fates).enumerate() {
            if !matches!(fate, ChannelFate::Added | ChannelFate::Restarted) {
                continue;
            }
            let old = old_state.channel(&spec.name).cloned();
            let (mut ch, inbox) =
                ChannelShared::with_alarm_commands(spec.clone(), new.trend_seconds);
            if let Some(o) = &old {
                // Counters never go back: a restarted channel counts on.
                ch.counters = o.counters.clone();
            }
            let ch = Arc::new(ch);
            let capacity = RingSize::FromConfig.capacity(new, spec);
            let (w, r) = match try_channel_ring(capacity, spec.sample_rate_hz, ch.counters.clone())
            {
                Ok(x) => x,
                Err(e) => {
                    problems.push(Problem {
                        path: format!("channel {:?}", spec.name),
                        message: e.to_string(),
                    });
                    continue;
                }
            };
            let mut dsp = ChannelDsp::with_machines(ch.clone(), r, &old_state.machines);
            dsp.set_gather(self.gather);
            if let Some(tap) = self
                .history
                .as_ref()
                .and_then(|h| h.tap(ch.spec.clone(), ch.window_enbw_bins))
            {
                dsp.set_history(tap);
            }
            let board = old.as_ref().and_then(|o| o.alarm_board.load_full());
            let old_spec = old.as_ref().map(|o| o.spec.clone());
            let carried = |band: &str| {
                old_spec
                    .as_deref()
                    .and_then(|s| memory_from_board(board.as_deref(), s, band))
            };
            match (self.mode, &self.store) {
                (super::AlarmMode::Off, _) => {}
                (super::AlarmMode::FromConfig, Some(store)) => {
                    dsp.set_alarms(store.channel_alarms_with(spec, inbox, &carried));
                }
                (super::AlarmMode::FromConfig | super::AlarmMode::InMemory, _) => {
                    let ctx = crate::alarm::engine::AlarmContext::in_memory(inbox);
                    let ctx = crate::alarm::engine::AlarmContext {
                        memory: &carried,
                        ..ctx
                    };
                    dsp.set_alarms(crate::alarm::engine::ChannelAlarms::new(spec, ctx));
                }
            }
            built.push((i, ch, dsp, w));
        }
        if !problems.is_empty() {
            return Err(ReloadError::Refused(problems));
        }

        // 2. Sources: which stop, restart, start; detach the channels
        // that go (removed or restarted) from sources that run on.
        let new_sources: BTreeMap<&str, &crate::config::SourceSpec> =
            new.sources.iter().map(|s| (s.name.as_str(), s)).collect();
        let gone: Vec<(String, usize)> = self
            .config
            .channels
            .iter()
            .filter(|c| {
                plan.removed.contains(&c.name)
                    || new
                        .channels
                        .iter()
                        .zip(&plan.fates)
                        .any(|(n, f)| n.name == c.name && *f == ChannelFate::Restarted)
            })
            .map(|c| (c.source.clone(), c.index))
            .collect();
        let mut stopped: BTreeMap<
            String,
            (
                Vec<Option<ChannelInput>>,
                Arc<crate::counters::SourceCounters>,
            ),
        > = BTreeMap::new();
        let mut running = Vec::new();
        for s in std::mem::take(&mut self.sources) {
            let keep = new_sources
                .get(s.spec.name.as_str())
                .is_some_and(|n| same(*n, &s.spec));
            if keep {
                running.push(s);
            } else {
                let name = s.spec.name.clone();
                let counters = s.counters.clone();
                let kind_same = new_sources
                    .get(name.as_str())
                    .is_some_and(|n| n.kind.as_str() == s.spec.kind.as_str());
                let inputs = s.stop().await;
                if new_sources.contains_key(name.as_str()) {
                    summary.sources_restarted.push(name.clone());
                } else {
                    summary.sources_removed.push(name.clone());
                }
                let counters = if kind_same {
                    counters
                } else {
                    Arc::new(crate::counters::SourceCounters::new(
                        &name,
                        new_sources
                            .get(name.as_str())
                            .map_or("", |n| n.kind.as_str()),
                    ))
                };
                stopped.insert(name, (inputs, counters));
            }
        }
        for s in &running {
            for (src, index) in &gone {
                if *src == s.spec.name {
                    s.port.change(*index, None);
                }
            }
        }
        // A running source applies the change before its next frame; one
        // that writes nothing in the meantime adds nothing to the rings.
        for _ in 0..50 {
            if running.iter().all(|s| !s.port.has_pending()) {
                break;
            }
            tokio::time::sleep(std::time::Duration::from_millis(10)).await;
        }

        // 3. Workers: removed and restarted channels drain their rings and
        // stop; changed ones take their new limits; new ones start.
        let mut shared: Vec<Option<Arc<ChannelShared>>> = vec![None; new.channels.len()];
        for c in &self.config.channels {
            let restarted = built.iter().any(|(_, ch, ..)| ch.spec.name == c.name);
            if !(plan.removed.contains(&c.name) || restarted) {
                continue;
            }
            if let Some(old) = old_state.channel(&c.name) {
                if let Some(t) = old.worker.get().cloned() {
                    answered(
                        workers.send(&t, WorkerCommand::Remove(old.clone())),
                        "remove",
                    )
                    .await;
                }
            }
            if plan.removed.contains(&c.name) {
                summary.removed.push(c.name.clone());
            }
        }
        for (i, (spec, fate)) in new.channels.iter().zip(&plan.fates).enumerate() {
            let Some(old) = old_state.channel(&spec.name) else {
                continue;
            };
            match fate {
                ChannelFate::Kept => {
                    shared[i] = Some(old.clone());
                    summary.kept.push(spec.name.clone());
                }
                ChannelFate::Changed => {
                    let ch = Arc::new(old.carried_over(spec.clone()));
                    if let Some(t) = old.worker.get().cloned() {
                        let cmd = WorkerCommand::Retarget {
                            old: old.clone(),
                            new: ch.clone(),
                        };
                        answered(workers.send(&t, cmd), "retarget").await;
                    }
                    shared[i] = Some(ch);
                    summary.changed.push(spec.name.clone());
                }
                ChannelFate::Restarted | ChannelFate::Added => {}
            }
        }
        let mut attach: Vec<(String, usize, ChannelInput)> = Vec::new();
        for (i, ch, dsp, w) in built {
            let Some(t) = workers.next_thread() else {
                continue;
            };
            answered(workers.send(&t, WorkerCommand::Add(Box::new(dsp))), "add").await;
            attach.push((
                ch.spec.source.clone(),
                ch.spec.index,
                input_of(&ch.spec, w, t),
            ));
            match plan.fates[i] {
                ChannelFate::Restarted => summary.restarted.push(ch.spec.name.clone()),
                _ => summary.added.push(ch.spec.name.clone()),
            }
            shared[i] = Some(ch);
        }

        // 4. Attach the new channels; start the restarted and added
        // sources over their channels' inputs.
        let mut rest = Vec::new();
        for (src, index, input) in attach {
            match running.iter().find(|s| s.spec.name == src) {
                Some(s) => s.port.change(index, Some(input)),
                None => rest.push((src, index, Some(input))),
            }
        }
        let mut sources = Vec::new();
        let mut counters = Vec::new();
        for spec in &new.sources {
            if let Some(pos) = running.iter().position(|s| s.spec.name == spec.name) {
                let s = running.swap_remove(pos);
                counters.push(s.counters.clone());
                sources.push(s);
                continue;
            }
            let (mut slots, c) = match stopped.remove(&spec.name) {
                Some(x) => x,
                None => {
                    summary.sources_added.push(spec.name.clone());
                    (
                        Vec::new(),
                        Arc::new(crate::counters::SourceCounters::new(
                            &spec.name,
                            spec.kind.as_str(),
                        )),
                    )
                }
            };
            slots.resize_with(spec.channels, || None);
            slots.truncate(spec.channels);
            for (src, index) in &gone {
                if *src == spec.name {
                    if let Some(slot) = slots.get_mut(*index) {
                        *slot = None;
                    }
                }
            }
            for (_, index, input) in rest.iter_mut().filter(|(s, ..)| *s == spec.name) {
                if let Some(slot) = slots.get_mut(*index) {
                    *slot = input.take();
                }
            }
            counters.push(c.clone());
            sources.push(RunningSource::spawn(spec, slots, c));
        }
        self.sources = sources;

        // 5. Publish the new state.
        let channels: Vec<Arc<ChannelShared>> = shared.into_iter().flatten().collect();
        let mut app = AppState::with_channels(new, channels);
        app.sources = counters;
        app.machines = old_state.machines.clone();
        app.token = old_state.token.clone();
        app.alarm_io = old_state.alarm_io.clone();
        app.history = old_state.history.clone();
        app.captures_dir = old_state.captures_dir.clone();
        app.started_unix_ns = old_state.started_unix_ns;
        app.reloads = old_state.reloads.clone();
        self.live.store(Arc::new(app));
        self.config = new.clone();
        Ok(summary)
    }
}
