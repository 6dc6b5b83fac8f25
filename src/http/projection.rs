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
//! A projection is guidance for planning (README "Time to limit"), not a
//! prediction of failure.

use crate::alarm::engine::AlarmView;
use crate::config::alarms::Direction;
use crate::config::{AlarmTarget, ChannelAlarm};
use crate::dsp::trend::{fit_trend, Growth, Projection, Reach, TrendError, MAX_POINTS};
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
    alarms
        .iter()
        .zip(views)
        .map(|(a, v)| {
            let direction = a
                .spec
                .alert
                .or(a.spec.danger)
                .map_or(Direction::High, |l| l.direction);
            let high = direction == Direction::High;
            let (x, y) = points(cols, series_of(a.target), high);
            let limits: Vec<(&'static str, f64)> =
                [("alert", v.alert_limit), ("danger", v.danger_limit)]
                    .into_iter()
                    .filter_map(|(l, lim)| lim.filter(|v| v.is_finite()).map(|v| (l, v)))
                    .collect();
            let fit = fit_trend(&x, &y, growth, ALPHA);
            let levels = match &fit {
                Ok(p) => limits
                    .iter()
                    .map(|&(level, limit)| LevelReach {
                        level,
                        limit,
                        reach: p.reach(limit, high, now_s),
                    })
                    .collect(),
                Err(_) => Vec::new(),
            };
            AlarmProjection {
                name: a.name.clone(),
                direction,
                points: x.len(),
                fit,
                levels,
            }
        })
        .collect()
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
