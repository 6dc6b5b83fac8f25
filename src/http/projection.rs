//! Time to limit: for each alarm of a channel, the trend of what it
//! watches over the last seconds the channel keeps in memory
//! (`[server] trend_seconds`), tested with Mann–Kendall and fitted with
//! Theil–Sen (`dsp::trend`), and when the trend is significant and moves
//! toward a limit, when the fitted line reaches the alert and the danger
//! limit, with the interval from the slope's confidence interval.
//!
//! The series fitted is the per-second maximum of the watched value for a
//! high limit (the alarm judges every value; a second's largest is the one
//! that trips it first) and the per-second minimum for a low limit; seconds
//! in which the value was not ok are left out. Longer windows than
//! `dsp::trend::MAX_POINTS` seconds are thinned to that many points by
//! taking each run of consecutive points' extreme (same side) and its time.
//!
//! With `[history]`, an alarm whose series the history file holds is
//! fitted over the stored aggregates instead: the last
//! `[history] projection_window_s`, one point per stored interval (its
//! `max` column for a high limit, `min` for a low one), thinned the same
//! way; an alarm without stored rows falls back to the in-memory trend.
//! Each alarm's answer says which (`source`) and the window fitted.
//!
//! A projection is guidance for planning (README "Time to limit"), not a
//! prediction of failure.

use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query};
use axum::Json;
use serde::Serialize;
use utoipa::{IntoParams, ToSchema};

use crate::alarm::engine::AlarmView;
use crate::clock::unix_now_ns;
use crate::config::alarms::Direction;
use crate::config::{AlarmTarget, ChannelAlarm, ChannelSpec};
use crate::dsp::trend::{fit_trend, Growth, Projection, Reach, TrendError, MAX_POINTS};
use crate::history::HistoryShared;
use crate::http::api::{channel_of, rfc3339_ns, Params};
use crate::http::error::{ApiError, ErrorBody};
use crate::http::Live;
use crate::pipeline::state::ChannelShared;
use crate::pipeline::trend::{TrendColumns, OVERALL_MEASURES};

/// The significance level of the Mann–Kendall test, and 1 − the
/// confidence of the slope's interval (common practice: 5 %).
pub const ALPHA: f64 = 0.05;

/// Index in the trend's series of what an alarm watches.
fn series_of(target: AlarmTarget) -> usize {
    let overall = |m: &str| OVERALL_MEASURES.iter().position(|&x| x == m).unwrap_or(0);
    match target {
        AlarmTarget::OverallRms => overall("rms"),
        AlarmTarget::OverallPeak => overall("peak"),
        AlarmTarget::CrestFactor => overall("crest_factor"),
        AlarmTarget::Band(j) => OVERALL_MEASURES.len() + j,
    }
}

/// The points a projection fits: (seconds, value), the per-second max
/// (`high`) or min, ok values only, thinned to at most `MAX_POINTS`.
pub fn points(cols: &TrendColumns, series: usize, high: bool) -> (Vec<f64>, Vec<f64>) {
    let Some(s) = cols.series.get(series) else {
        return (Vec::new(), Vec::new());
    };
    let col = if high { &s.max } else { &s.min };
    let raw: Vec<(f64, f64)> = cols
        .t
        .iter()
        .zip(col)
        .filter_map(|(&t, v)| v.map(|v| (t as f64, f64::from(v))))
        .collect();
    thin(&raw, high)
}

/// `raw` (time, value; oldest first) thinned to at most `MAX_POINTS`:
/// runs of ⌈len / MAX_POINTS⌉ consecutive points, each run's extreme
/// (the largest for `high`, else the smallest) at its own time.
pub fn thin(raw: &[(f64, f64)], high: bool) -> (Vec<f64>, Vec<f64>) {
    let k = raw.len().div_ceil(MAX_POINTS).max(1);
    let better = |a: f64, b: f64| if high { a > b } else { a < b };
    raw.chunks(k)
        .filter_map(|run| {
            run.iter()
                .copied()
                .reduce(|best, p| if better(p.1, best.1) { p } else { best })
        })
        .unzip()
}

/// The name of the history series an alarm watches (`schema::OVERALL_SERIES`
/// or the band's name).
pub fn stored_series(spec: &ChannelSpec, target: AlarmTarget) -> Option<&str> {
    match target {
        AlarmTarget::OverallRms => Some("overall-rms"),
        AlarmTarget::OverallPeak => Some("overall-peak"),
        AlarmTarget::CrestFactor => Some("overall-crest-factor"),
        AlarmTarget::Band(j) => spec.bands.get(j).map(|b| b.name.as_str()),
    }
}

fn direction_of(a: &ChannelAlarm) -> Direction {
    a.spec
        .alert
        .or(a.spec.danger)
        .map_or(Direction::High, |l| l.direction)
}

/// The (times, values) a fit is given.
pub type Fitted = (Vec<f64>, Vec<f64>);

/// Where the points of one alarm's fit came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Source {
    /// The channel's in-memory trend (per-second extremes).
    Memory,
    /// The history file (per-interval extremes).
    History,
}

impl Source {
    pub fn as_str(self) -> &'static str {
        match self {
            Source::Memory => "memory",
            Source::History => "history",
        }
    }
}

/// The points of one alarm's fit and where they came from.
#[derive(Debug, Clone, PartialEq)]
pub struct AlarmPoints {
    pub x: Vec<f64>,
    pub y: Vec<f64>,
    pub source: Source,
    /// Seconds of data asked for (the window fitted).
    pub window_s: f64,
}

/// Per alarm of `spec`, its stored per-interval extremes (`max` for a high
/// limit, `min` for a low one) from `from_s` on, thinned as [`points`]
/// thins; None for an alarm whose series has no stored row there.
///
/// # Errors
/// The file's error.
pub fn stored_points(
    conn: &rusqlite::Connection,
    spec: &ChannelSpec,
    from_s: i64,
) -> Result<Vec<Option<Fitted>>, crate::history::query::QueryError> {
    spec.alarms
        .iter()
        .map(|a| {
            let Some(series) = stored_series(spec, a.target) else {
                return Ok(None);
            };
            let high = direction_of(a) == Direction::High;
            let raw = crate::history::query::extremes(conn, &spec.name, series, from_s, high)?;
            Ok((!raw.is_empty()).then(|| thin(&raw, high)))
        })
        .collect()
}

/// The points of every alarm of `ch`: the stored ones over the last
/// `history_window_s` where the history has them, else the in-memory
/// trend's over its last `memory_seconds`. Opens the history file (when
/// there is one) read-only: call it on a blocking thread.
pub fn alarm_points(
    history: Option<&HistoryShared>,
    ch: &ChannelShared,
    memory_seconds: usize,
    history_window_s: Option<u64>,
    now_s: f64,
) -> Vec<AlarmPoints> {
    let spec = &ch.spec;
    let stored = history.filter(|h| h.spec.file.exists()).and_then(|h| {
        let window = history_window_s.unwrap_or(h.spec.projection_window_s);
        let from = (now_s as i64).saturating_sub(window as i64);
        let read = crate::history::schema::open_read(&h.spec.file)
            .map_err(|e| e.to_string())
            .and_then(|c| stored_points(&c, spec, from).map_err(|e| e.to_string()));
        match read {
            Ok(p) => Some((p, window)),
            Err(e) => {
                tracing::warn!(error = %e, channel = %spec.name,
                        "time to limit: cannot read the history; using the in-memory trend");
                None
            }
        }
    });
    let mut cols = None;
    spec.alarms
        .iter()
        .enumerate()
        .map(|(i, a)| {
            if let Some((p, window)) = &stored {
                if let Some(Some((x, y))) = p.get(i) {
                    return AlarmPoints {
                        x: x.clone(),
                        y: y.clone(),
                        source: Source::History,
                        window_s: *window as f64,
                    };
                }
            }
            let cols =
                cols.get_or_insert_with(|| ch.trend.read(memory_seconds, now_s.max(0.0) as u64));
            let (x, y) = points(
                cols,
                series_of(a.target),
                direction_of(a) == Direction::High,
            );
            AlarmPoints {
                x,
                y,
                source: Source::Memory,
                window_s: memory_seconds as f64,
            }
        })
        .collect()
}

/// One level's answer.
#[derive(Debug, Clone, PartialEq)]
pub struct LevelReach {
    /// "alert" or "danger".
    pub level: &'static str,
    pub limit: f64,
    pub reach: Reach,
}

/// One alarm's trend and where it leads.
#[derive(Debug, Clone, PartialEq)]
pub struct AlarmProjection {
    pub name: String,
    pub direction: Direction,
    pub points: usize,
    pub source: Source,
    pub window_s: f64,
    /// The fit and the test, or why there is none.
    pub fit: Result<Projection, TrendError>,
    pub levels: Vec<LevelReach>,
}

/// The projections of `alarms` (with their views, for the limits in force)
/// over the trend columns `cols`, at `now_s`.
pub fn project_alarms(
    alarms: &[ChannelAlarm],
    views: &[AlarmView],
    cols: &TrendColumns,
    growth: Growth,
    now_s: f64,
) -> Vec<AlarmProjection> {
    let pts: Vec<AlarmPoints> = alarms
        .iter()
        .map(|a| {
            let (x, y) = points(
                cols,
                series_of(a.target),
                direction_of(a) == Direction::High,
            );
            AlarmPoints {
                x,
                y,
                source: Source::Memory,
                window_s: cols.t.len() as f64,
            }
        })
        .collect();
    project_points(alarms, views, &pts, growth, now_s)
}

/// The projections of `alarms` over their points `pts` (one per alarm).
pub fn project_points(
    alarms: &[ChannelAlarm],
    views: &[AlarmView],
    pts: &[AlarmPoints],
    growth: Growth,
    now_s: f64,
) -> Vec<AlarmProjection> {
    alarms
        .iter()
        .zip(views)
        .zip(pts)
        .map(|((a, v), p)| {
            let direction = direction_of(a);
            let high = direction == Direction::High;
            let limits: Vec<(&'static str, f64)> =
                [("alert", v.alert_limit), ("danger", v.danger_limit)]
                    .into_iter()
                    .filter_map(|(l, lim)| lim.filter(|v| v.is_finite()).map(|v| (l, v)))
                    .collect();
            let fit = fit_trend(&p.x, &p.y, growth, ALPHA);
            let levels = match &fit {
                Ok(f) => limits
                    .iter()
                    .map(|&(level, limit)| LevelReach {
                        level,
                        limit,
                        reach: f.reach(limit, high, now_s),
                    })
                    .collect(),
                Err(_) => Vec::new(),
            };
            AlarmProjection {
                name: a.name.clone(),
                direction,
                points: p.x.len(),
                source: p.source,
                window_s: p.window_s,
                fit,
                levels,
            }
        })
        .collect()
}

/// When each alarm of a channel reaches its limits, as of one
/// computation: per alarm, per level (alert, danger), the Unix time in
/// seconds the fitted line reaches the limit (the computation's time when
/// it is already past it); None without a significant trend toward it.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ChannelReach {
    pub computed_s: f64,
    pub alarms: Vec<[Option<f64>; 2]>,
}

/// [`ChannelReach`] of `ch` at `now_s` with the API's defaults: over the
/// stored history's `projection_window_s` where it has the alarm's series,
/// else the whole in-memory trend; exponential growth. Reads the history
/// file when there is one (a blocking read: the scrape's render runs on a
/// blocking thread, within its time budget).
pub fn channel_reach_in(
    history: Option<&HistoryShared>,
    ch: &ChannelShared,
    now_s: f64,
) -> ChannelReach {
    let spec = &ch.spec;
    let board = ch.alarm_board.load();
    let Some(board) = board
        .as_ref()
        .filter(|b| b.alarms.len() == spec.alarms.len())
    else {
        return ChannelReach {
            computed_s: now_s,
            alarms: vec![[None, None]; spec.alarms.len()],
        };
    };
    let pts = alarm_points(history, ch, ch.trend.capacity_seconds(), None, now_s);
    let alarms = project_points(
        &spec.alarms,
        &board.alarms,
        &pts,
        Growth::Exponential,
        now_s,
    )
    .iter()
    .map(|p| {
        let mut out = [None, None];
        for l in &p.levels {
            let k = usize::from(l.level == "danger");
            out[k] = match l.reach {
                Reach::At { at, .. } => Some(at),
                Reach::Beyond => Some(now_s),
                Reach::NoSignificantTrend | Reach::Away => None,
            };
        }
        out
    })
    .collect();
    ChannelReach {
        computed_s: now_s,
        alarms,
    }
}

/// What a projection says, in words a reader keeps.
pub const PROJECTION_CAUTION: &str = "a projection is guidance for planning \
(when to look, when to plan the work), not a prediction of failure: a trend \
can change at any time; defer to the machine maker and licensed practice";

/// The query of the projection endpoint.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct ProjectionQuery {
    /// Seconds of trend fitted, newest last (default, and at most, what
    /// the channel keeps: `[server] trend_seconds`; at least 10).
    #[param(minimum = 10)]
    seconds: Option<u64>,
    /// `exponential` (default: a fit on ln(value), growth by the same
    /// factor per unit time) or `linear` (a fit on the values).
    #[param(value_type = Option<String>, pattern = "^(exponential|linear)$")]
    growth: Option<String>,
}

/// The Mann–Kendall test of an alarm's trend.
#[derive(Serialize, ToSchema)]
pub struct TestBody {
    /// S = Σ sign(yⱼ − yᵢ), i < j.
    s: i64,
    /// Var(S), tie corrected.
    var_s: f64,
    /// With the continuity correction.
    z: f64,
    /// Two-sided.
    p: f64,
    tau: f64,
    /// p below the significance level.
    significant: bool,
}

/// The Theil–Sen slope of an alarm's trend.
#[derive(Serialize, ToSchema)]
pub struct SlopeBody {
    /// Linear growth: the alarm's unit per second. Exponential growth:
    /// d ln(value)/dt per second (0.01 is about 1 % a second).
    per_second: f64,
    /// The interval at 1 − significance confidence (Sen 1968).
    low_per_second: f64,
    high_per_second: f64,
    /// "<unit>/s", or "1/s" (of ln value) for exponential growth.
    unit: String,
    /// Exponential growth with a rising slope: ln 2 / slope, the seconds
    /// in which the level doubles at that pace; else null.
    doubling_seconds: Option<f64>,
}

/// One limit's answer.
#[derive(Serialize, ToSchema)]
pub struct LevelBody {
    /// "alert" or "danger".
    level: &'static str,
    /// The limit in force (the alarm's unit).
    limit: f64,
    /// `no_significant_trend`, `away` (a significant trend moving away
    /// from the limit), `beyond` (the fitted line is past the limit now) or
    /// `crossing`.
    outcome: &'static str,
    /// `crossing`: seconds from now until the fitted line reaches the
    /// limit; `beyond`: 0.
    seconds_to_limit: Option<f64>,
    /// `crossing`: with the steep end of the slope's interval.
    earliest_seconds: Option<f64>,
    /// `crossing`: with the shallow end; null when that end does not move
    /// toward the limit (no bound).
    latest_seconds: Option<f64>,
    /// `crossing`: when, RFC 3339.
    at: Option<String>,
}

/// One alarm's trend and where it leads.
#[derive(Serialize, ToSchema)]
pub struct AlarmProjectionBody {
    /// The alarm's name (its band's, or overall-rms, overall-peak,
    /// overall-crest-factor).
    name: String,
    /// The unit of the value and the limits ("1": dimensionless).
    unit: &'static str,
    /// "high" or "low": which side of the limits is abnormal.
    direction: &'static str,
    /// Points fitted (per-second extremes of the in-memory trend, or
    /// per-interval extremes of the stored history; thinned to at most 513).
    points: usize,
    /// Where the points came from: "history" (the stored aggregates, when
    /// `[history]` holds the alarm's series in the window) or "memory" (the
    /// channel's in-memory trend).
    source: &'static str,
    /// Seconds of data fitted: the in-memory trend's (`seconds`), or the
    /// stored history's (`[history] projection_window_s`, or `seconds` if
    /// less).
    window_s: f64,
    /// Why there is no fit (too few points, a value not above zero for
    /// the exponential model), else null.
    no_fit: Option<String>,
    test: Option<TestBody>,
    slope: Option<SlopeBody>,
    levels: Vec<LevelBody>,
}

/// `GET /api/v1/channels/{name}/projection`.
#[derive(Serialize, ToSchema)]
pub struct ProjectionBody {
    channel: String,
    /// When it was computed, RFC 3339.
    at: Option<String>,
    /// Seconds of in-memory trend fitted (for alarms whose source is
    /// "memory"; each alarm says its own `source` and `window_s`).
    seconds: usize,
    growth: &'static str,
    /// The Mann–Kendall significance level (and 1 − the confidence of the
    /// slope's interval).
    significance: f64,
    method: &'static str,
    caution: &'static str,
    alarms: Vec<AlarmProjectionBody>,
}

fn level_body(l: &LevelReach, now_s: f64) -> LevelBody {
    let (outcome, to, earliest, latest, at) = match l.reach {
        Reach::NoSignificantTrend => ("no_significant_trend", None, None, None, None),
        Reach::Away => ("away", None, None, None, None),
        Reach::Beyond => ("beyond", Some(0.0), None, None, None),
        Reach::At {
            at,
            earliest,
            latest,
        } => (
            "crossing",
            Some((at - now_s).max(0.0)),
            Some((earliest - now_s).max(0.0)),
            latest.map(|t| (t - now_s).max(0.0)),
            rfc3339_ns((at.max(0.0) * 1e9).min(u64::MAX as f64) as u64),
        ),
    };
    LevelBody {
        level: l.level,
        limit: l.limit,
        outcome,
        seconds_to_limit: to,
        earliest_seconds: earliest,
        latest_seconds: latest,
        at,
    }
}

/// `GET /api/v1/channels/{name}/projection?seconds=N&growth=...`: for each
/// alarm of the channel, the trend of what it watches over the stored
/// history (`[history]`, where it holds the series) or the channel's
/// in-memory trend, and the time its alert and danger limits are reached
/// at that pace (module docs; README "Time to limit").
#[utoipa::path(get, path = "/api/v1/channels/{name}/projection", tag = "channels",
    params(("name" = String, Path, description = "Channel name"), ProjectionQuery),
    responses(
        (status = 200, description = "Each alarm's trend and time to its limits", body = ProjectionBody),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No such channel", body = ErrorBody),
    ))]
pub async fn projection(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Json<ProjectionBody>, ApiError> {
    let params = Params::of::<ProjectionQuery>(q)?;
    let ch = channel_of(&st.app, &name)?.clone();
    let capacity = ch.trend.capacity_seconds();
    let asked = match params.get("seconds") {
        None => None,
        Some(v) => match v.trim().parse::<u64>() {
            Ok(n) if n >= 10 => Some(n),
            _ => {
                return Err(ApiError::BadQuery(format!(
                    "seconds={v:?} is not a whole number of seconds, 10 or more"
                )))
            }
        },
    };
    let seconds = asked.map_or(capacity, |n| (n.min(capacity as u64)) as usize);
    let growth = match params.get("growth") {
        None | Some("exponential") => Growth::Exponential,
        Some("linear") => Growth::Linear,
        Some(g) => {
            return Err(ApiError::BadQuery(format!(
                "growth={g:?} is not known (known: exponential, linear)"
            )))
        }
    };
    let now_ns = unix_now_ns();
    let now_s = now_ns as f64 * 1e-9;
    // The stored history's window: projection_window_s, or less if asked.
    let history = st.app.history.clone();
    let window = history.as_ref().map(|h| {
        asked.map_or(h.spec.projection_window_s, |n| {
            n.min(h.spec.projection_window_s)
        })
    });
    let pts = {
        let ch = ch.clone();
        tokio::task::spawn_blocking(move || {
            alarm_points(history.as_deref(), &ch, seconds, window, now_s)
        })
        .await
        .map_err(|e| {
            tracing::error!(error = %e, "a projection task failed");
            ApiError::Internal
        })?
    };
    let spec = &ch.spec;
    let views: Vec<AlarmView> = ch
        .alarm_board
        .load()
        .as_ref()
        .map(|b| b.alarms.clone())
        .unwrap_or_default();
    // Without a board (no alarm engine) no limit is in force.
    let views = if views.len() == spec.alarms.len() {
        views
    } else {
        let none = AlarmView {
            state: crate::alarm::state::AlarmState::Normal,
            latched: false,
            acknowledged: false,
            since_unix_ns: 0,
            value: None,
            alert_limit: None,
            danger_limit: None,
            transitions: [0; 4],
            learning: None,
        };
        vec![none; spec.alarms.len()]
    };
    let alarms = project_points(&spec.alarms, &views, &pts, growth, now_s)
        .into_iter()
        .zip(&spec.alarms)
        .map(|(p, a)| {
            let (test, slope, no_fit) = match &p.fit {
                Ok(f) => (
                    Some(TestBody {
                        s: f.test.s,
                        var_s: f.test.var_s,
                        z: f.test.z,
                        p: f.test.p,
                        tau: f.test.tau,
                        significant: f.significant(),
                    }),
                    Some(SlopeBody {
                        per_second: f.fit.slope,
                        low_per_second: f.fit.low_slope,
                        high_per_second: f.fit.high_slope,
                        unit: match growth {
                            Growth::Linear => format!("{}/s", a.unit.map_or("1", |u| u.symbol)),
                            Growth::Exponential => "1/s".into(),
                        },
                        doubling_seconds: (growth == Growth::Exponential && f.fit.slope > 0.0)
                            .then(|| std::f64::consts::LN_2 / f.fit.slope),
                    }),
                    None,
                ),
                Err(e) => (None, None, Some(e.to_string())),
            };
            AlarmProjectionBody {
                name: p.name,
                unit: a.unit.map_or("1", |u| u.symbol),
                direction: match p.direction {
                    Direction::High => "high",
                    Direction::Low => "low",
                },
                points: p.points,
                source: p.source.as_str(),
                window_s: p.window_s,
                no_fit,
                test,
                slope,
                levels: p.levels.iter().map(|l| level_body(l, now_s)).collect(),
            }
        })
        .collect();
    Ok(Json(ProjectionBody {
        channel: spec.name.clone(),
        at: rfc3339_ns(now_ns),
        seconds,
        growth: growth.as_str(),
        significance: ALPHA,
        method: "Mann-Kendall test (Mann 1945, Kendall 1975; ties and continuity corrected, \
                 two-sided); Theil-Sen slope with Sen's (1968) interval, on ln(value) for \
                 exponential growth; per-interval extremes of the stored history where it \
                 holds the series, else per-second extremes of the in-memory trend",
        caution: PROJECTION_CAUTION,
        alarms,
    }))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pipeline::trend::SeriesColumns;

    fn cols(values: &[Option<f32>], t0: u64) -> TrendColumns {
        let n = values.len();
        let mut series = vec![SeriesColumns::default(); OVERALL_MEASURES.len() + 1];
        let band = series.last_mut().expect("band");
        band.max = values.to_vec();
        band.min = values.iter().map(|v| v.map(|v| v - 0.5)).collect();
        band.last = values.to_vec();
        TrendColumns {
            t: (0..n as u64).map(|i| t0 + i).collect(),
            series,
        }
    }

    #[test]
    fn points_keep_each_runs_extreme() {
        let v: Vec<Option<f32>> = (0..2000).map(|i| Some((i * 37 % 11) as f32)).collect();
        let c = cols(&v, 1_000);
        let (x, y) = points(&c, OVERALL_MEASURES.len(), true);
        // Runs of 4 (2000 / 513 rounded up): each run's largest, at its time.
        assert_eq!(x.len(), 500);
        for (k, (&t, &val)) in x.iter().zip(&y).enumerate() {
            let run = &v[4 * k..4 * k + 4];
            let (i, best) = run
                .iter()
                .enumerate()
                .map(|(i, v)| (i, v.unwrap_or(f32::MIN)))
                .fold((0, f32::MIN), |a, b| if b.1 > a.1 { b } else { a });
            assert_eq!(val, f64::from(best), "run {k}");
            assert_eq!(t, 1_000.0 + (4 * k + i) as f64, "run {k}");
        }
        let (_, lows) = points(&c, OVERALL_MEASURES.len(), false);
        assert_eq!(lows.len(), 500);
        for (k, &low) in lows.iter().enumerate() {
            let least = v[4 * k..4 * k + 4]
                .iter()
                .flatten()
                .fold(f32::MAX, |a, &b| a.min(b));
            assert_eq!(low, f64::from(least - 0.5), "run {k}: the minimum");
        }
    }

    #[test]
    fn seconds_without_a_value_are_left_out() {
        let mut v: Vec<Option<f32>> = (0..12).map(|i| Some(i as f32)).collect();
        v[3] = None;
        let (x, y) = points(&cols(&v, 50), OVERALL_MEASURES.len(), true);
        assert_eq!(x.len(), 11);
        assert!(!x.contains(&53.0));
        assert_eq!(y[3], 4.0);
    }

    /// A band rising 0.002 mm/s a second from 1 mm/s (with a small
    /// repeating ripple) for 600 s: at 600 s it is past its 2 mm/s alert,
    /// and reaches its 4 mm/s danger at 1500 s, 900 s after the last point.
    #[test]
    fn a_rising_band_reaches_danger_when_its_line_says() {
        let cfg = crate::config::parse_str(
            "[server]\nlisten = \"127.0.0.1:0\"\n[alarms]\nstorage_dir = \"/nonexistent\"\n\
             [[source]]\nname = \"s\"\nkind = \"sim\"\n\
             [[channel]]\nname = \"c\"\nsource = \"s\"\nindex = 0\nunit = \"g\"\nblock = 4096\n\
             integration_low_cut_hz = 5.0\n\
             [[channel.band]]\nname = \"v\"\nlo_hz = 10\nhi_hz = 1000\nunit = \"mm/s\"\n\
             [channel.band.alarm]\nalert = { limit = 2.0 }\ndanger = { limit = 4.0 }\n",
        )
        .expect("config");
        let alarms = &cfg.channels[0].alarms;
        let view = AlarmView {
            state: crate::alarm::state::AlarmState::Alert,
            latched: false,
            acknowledged: false,
            since_unix_ns: 0,
            value: Some(2.2),
            alert_limit: Some(2.0),
            danger_limit: Some(4.0),
            transitions: [0; 4],
            learning: None,
        };
        let ripple = [0.0, 0.01, -0.01, 0.005, -0.005];
        let v: Vec<Option<f32>> = (0..600)
            .map(|i| Some((1.0 + 0.002 * i as f64 + ripple[i % 5]) as f32))
            .collect();
        let c = cols(&v, 10_000);
        let now = 10_599.0;
        let got = project_alarms(alarms, &[view], &c, Growth::Linear, now);
        assert_eq!(got.len(), 1);
        let p = &got[0];
        assert_eq!(p.points, 600 / 2);
        let fit = p.fit.as_ref().expect("fit");
        assert!(fit.test.p < 1e-10, "{:?}", fit.test);
        assert_eq!(p.levels.len(), 2);
        assert_eq!(p.levels[0].reach, Reach::Beyond);
        let Reach::At {
            at,
            earliest,
            latest,
        } = p.levels[1].reach
        else {
            panic!("{:?}", p.levels[1])
        };
        // 1 + 0.002 (t − 10 000) = 4 at t = 11 500 (the per-run maxima sit
        // up to 0.01 above the line: a few seconds earlier).
        assert!((at - 11_500.0).abs() < 10.0, "{at}");
        assert!(earliest <= at && Some(at) <= latest.or(Some(f64::MAX)));
        // The exponential model on the same rise says a danger time too.
        let e = project_alarms(alarms, &[view], &c, Growth::Exponential, now);
        assert!(
            matches!(e[0].levels[1].reach, Reach::At { .. }),
            "{:?}",
            e[0].levels
        );
    }
}
