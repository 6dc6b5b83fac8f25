//! Trend statistics of a band's history: is it really moving, how fast,
//! and when does it reach a limit at that pace.
//!
//! - [`theil_sen`]: the median of the pairwise slopes (Sen 1968, after
//!   Theil 1950) with Sen's confidence interval (his equation 2.6, with the
//!   tie correction), and the intercept through the medians. Robust: up to
//!   about 29 % of the points can be wild without moving the slope much,
//!   and it assumes no distribution of the noise. Computed exactly as
//!   `scipy.stats.theilslopes` (method "separate") does, which the tests
//!   check it against.
//! - [`mann_kendall`]: the Mann–Kendall test for a monotonic trend (Mann
//!   1945; Kendall 1975): S = Σ sign(yⱼ − yᵢ) over i < j in time order; its
//!   variance with the tie correction [n(n−1)(2n+5) − Σ t(t−1)(2t+5)] / 18
//!   (t: the size of each group of equal values); Z = (S − 1)/σ for S > 0,
//!   (S + 1)/σ for S < 0, 0 for S = 0 (the continuity correction); p two
//!   sided from the normal distribution. As `pymannkendall.original_test`
//!   computes it, which the tests check it against; S and the variance
//!   also against `scipy.stats.kendalltau` on the time index. Rank based:
//!   the same on the values and on their logarithm.
//! - [`fit_trend`] and [`Projection::reach`]: both on a window of points, and the time a limit is
//!   reached: on the values (linear growth) or on their natural logarithm
//!   (exponential growth: a constant percentage per unit time, how a
//!   developing defect's level commonly grows, common practice). Only when
//!   the Mann–Kendall p value is below the significance level, and the
//!   trend moves toward the limit, is there a time; otherwise the answer
//!   says why not.
//!
//! Work and memory are O(n²) in the points (every pair's slope): the
//! callers thin a long history to at most [`MAX_POINTS`] points first.

/// Most points [`theil_sen`] and [`mann_kendall`] take (131 328 pairs).
pub const MAX_POINTS: usize = 513;

/// Fewest points for a projection: below about 10 the normal
/// approximation of the Mann–Kendall statistic is poor (common practice;
/// exact tables exist for fewer, from memory n ≤ 10).
pub const MIN_POINTS: usize = 10;

/// The standard normal distribution function Φ(z).
pub fn normal_cdf(z: f64) -> f64 {
    0.5 * libm::erfc(-z / std::f64::consts::SQRT_2)
}

/// The two-sided tail 2(1 − Φ(|z|)) = erfc(|z|/√2), without the
/// cancellation of 1 − Φ far out in the tail.
pub fn normal_two_sided(z: f64) -> f64 {
    libm::erfc(z.abs() / std::f64::consts::SQRT_2)
}

/// The standard normal quantile Φ⁻¹(p) for 0 < p < 1, by bisection on
/// [`normal_cdf`] (to the last bits of an f64; called once per
/// projection, so speed does not matter).
pub fn normal_quantile(p: f64) -> f64 {
    if p.is_nan() || p <= 0.0 {
        return f64::NEG_INFINITY;
    }
    if p >= 1.0 {
        return f64::INFINITY;
    }
    let (mut lo, mut hi) = (-40.0_f64, 40.0_f64);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if mid == lo || mid == hi {
            break;
        }
        if normal_cdf(mid) < p {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

/// Median of a sorted, non-empty slice (mean of the middle two for an
/// even length, as numpy's median).
fn median_sorted(v: &[f64]) -> f64 {
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    median_sorted(&s)
}

/// Σ t(t−1)(2t+5) over the groups of equal values of `v` (t ≥ 2).
fn tie_term(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let mut sum = 0.0;
    let mut i = 0;
    while i < s.len() {
        let mut j = i + 1;
        while j < s.len() && s[j] == s[i] {
            j += 1;
        }
        let t = (j - i) as f64;
        if t >= 2.0 {
            sum += t * (t - 1.0) * (2.0 * t + 5.0);
        }
        i = j;
    }
    sum
}

/// Why a statistic could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum TrendError {
    #[error("{0} points: at least {MIN_POINTS} are needed")]
    TooFew(usize),
    #[error("{0} points: at most {MAX_POINTS} are taken (thin the history first)")]
    TooMany(usize),
    #[error("x and y differ in length ({0} and {1})")]
    Lengths(usize, usize),
    #[error("point {0} is not a finite number")]
    NotFinite(usize),
    #[error("point {0} is not above zero: the exponential model takes logarithms")]
    NotPositive(usize),
    #[error("every point has the same time: no slope")]
    NoSpread,
}

/// Theil–Sen line and Sen's confidence interval of its slope.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TheilSen {
    pub slope: f64,
    /// median(y) − slope · median(x): the line passes through the medians.
    pub intercept: f64,
    pub low_slope: f64,
    pub high_slope: f64,
    /// median(x), median(y).
    pub x_median: f64,
    pub y_median: f64,
}

fn check(x: &[f64], y: &[f64], min: usize) -> Result<(), TrendError> {
    if x.len() != y.len() {
        return Err(TrendError::Lengths(x.len(), y.len()));
    }
    if y.len() < min {
        return Err(TrendError::TooFew(y.len()));
    }
    if y.len() > MAX_POINTS {
        return Err(TrendError::TooMany(y.len()));
    }
    if let Some(i) = x
        .iter()
        .zip(y)
        .position(|(a, b)| !a.is_finite() || !b.is_finite())
    {
        return Err(TrendError::NotFinite(i));
    }
    Ok(())
}

/// The Theil–Sen fit of `y` over `x` with the `confidence` (e.g. 0.95)
/// interval of the slope. Pairs with equal x are skipped, as scipy does.
pub fn theil_sen(x: &[f64], y: &[f64], confidence: f64) -> Result<TheilSen, TrendError> {
    check(x, y, 2)?;
    let n = y.len();
    let mut slopes = Vec::with_capacity(n * (n - 1) / 2);
    for i in 0..n {
        for j in 0..n {
            let dx = x[j] - x[i];
            if dx > 0.0 {
                slopes.push((y[j] - y[i]) / dx);
            }
        }
    }
    if slopes.is_empty() {
        return Err(TrendError::NoSpread);
    }
    slopes.sort_by(f64::total_cmp);
    let slope = median_sorted(&slopes);
    let (x_median, y_median) = (median(x), median(y));
    // Sen (1968), (2.6), as scipy.stats.theilslopes writes it.
    let alpha = if confidence > 0.5 {
        1.0 - confidence
    } else {
        confidence
    };
    let z = normal_quantile(alpha / 2.0);
    let nt = slopes.len() as f64;
    let ny = n as f64;
    let sigsq = (ny * (ny - 1.0) * (2.0 * ny + 5.0) - tie_term(x) - tie_term(y)) / 18.0;
    let sigma = sigsq.max(0.0).sqrt();
    let last = slopes.len() - 1;
    let ru = (((nt - z * sigma) / 2.0).round_ties_even().max(0.0) as usize).min(last);
    let rl = (((nt + z * sigma) / 2.0).round_ties_even() as i64 - 1).max(0) as usize;
    let rl = rl.min(last);
    Ok(TheilSen {
        slope,
        intercept: y_median - slope * x_median,
        low_slope: slopes[rl],
        high_slope: slopes[ru],
        x_median,
        y_median,
    })
}

/// The Mann–Kendall test of `y` (in time order).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MannKendall {
    pub n: usize,
    pub s: i64,
    /// Var(S) with the tie correction.
    pub var_s: f64,
    /// With the continuity correction.
    pub z: f64,
    /// Two-sided p value.
    pub p: f64,
    /// Kendall's τ = S / (n(n−1)/2).
    pub tau: f64,
}

pub fn mann_kendall(y: &[f64]) -> Result<MannKendall, TrendError> {
    check(y, y, 2)?;
    let n = y.len();
    let mut s: i64 = 0;
    for i in 0..n {
        for j in i + 1..n {
            s += match y[j].total_cmp(&y[i]) {
                std::cmp::Ordering::Greater => 1,
                std::cmp::Ordering::Less => -1,
                std::cmp::Ordering::Equal => 0,
            };
        }
    }
    let nf = n as f64;
    let var_s = (nf * (nf - 1.0) * (2.0 * nf + 5.0) - tie_term(y)) / 18.0;
    let z = if var_s <= 0.0 {
        0.0
    } else {
        match s.signum() {
            1 => (s - 1) as f64 / var_s.sqrt(),
            -1 => (s + 1) as f64 / var_s.sqrt(),
            _ => 0.0,
        }
    };
    let p = normal_two_sided(z);
    Ok(MannKendall {
        n,
        s,
        var_s,
        z,
        p,
        tau: s as f64 / (nf * (nf - 1.0) / 2.0),
    })
}

/// How the level is assumed to grow.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Growth {
    /// By the same amount per unit time: the fit is on the values.
    Linear,
    /// By the same factor per unit time: the fit is on ln(value).
    Exponential,
}

impl Growth {
    pub fn as_str(self) -> &'static str {
        match self {
            Growth::Linear => "linear",
            Growth::Exponential => "exponential",
        }
    }
}

/// Where the trend leads relative to a limit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Reach {
    /// The Mann–Kendall p value is not below the significance level.
    NoSignificantTrend,
    /// A significant trend, moving away from the limit (or flat).
    Away,
    /// The fitted line is already beyond the limit at `now`.
    Beyond,
    /// The fitted line reaches the limit at `at` (same time base as x):
    /// `earliest` with the steep end of the slope's interval, `latest` with
    /// the shallow end (None: that end does not move toward the limit, so
    /// no bound).
    At {
        at: f64,
        earliest: f64,
        latest: Option<f64>,
    },
}

/// A fitted and tested trend.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Projection {
    pub growth: Growth,
    /// The fit, on the values (linear) or on ln(values) (exponential).
    pub fit: TheilSen,
    pub test: MannKendall,
    pub alpha: f64,
}

/// Fits `y` over `x` (seconds; any origin) under `growth` and tests it;
/// `alpha`: the significance level of the Mann–Kendall test, and 1 − the
/// confidence of the slope's interval.
pub fn fit_trend(
    x: &[f64],
    y: &[f64],
    growth: Growth,
    alpha: f64,
) -> Result<Projection, TrendError> {
    check(x, y, MIN_POINTS)?;
    let values = match growth {
        Growth::Linear => y.to_vec(),
        Growth::Exponential => {
            if let Some(i) = y.iter().position(|&v| v <= 0.0) {
                return Err(TrendError::NotPositive(i));
            }
            y.iter().map(|v| v.ln()).collect()
        }
    };
    Ok(Projection {
        growth,
        fit: theil_sen(x, &values, 1.0 - alpha)?,
        test: mann_kendall(&values)?,
        alpha,
    })
}

impl Projection {
    /// Whether the Mann–Kendall p value is below the significance level.
    pub fn significant(&self) -> bool {
        self.test.p < self.alpha
    }

    /// When the fitted line reaches `limit`, rising toward it when
    /// `rising` (a high limit), falling otherwise; `now` is the time the
    /// answer is for (a line already past the limit then is
    /// [`Reach::Beyond`]). A limit not above zero under exponential growth
    /// is never reached ([`Reach::Away`] when the trend is significant).
    pub fn reach(&self, limit: f64, rising: bool, now: f64) -> Reach {
        if !self.significant() {
            return Reach::NoSignificantTrend;
        }
        let target = match self.growth {
            Growth::Linear => limit,
            Growth::Exponential if limit > 0.0 => limit.ln(),
            Growth::Exponential => {
                return if rising { Reach::Beyond } else { Reach::Away };
            }
        };
        let fit = &self.fit;
        let toward = |b: f64| if rising { b > 0.0 } else { b < 0.0 };
        let at_now = fit.y_median + fit.slope * (now - fit.x_median);
        let beyond = if rising {
            at_now >= target
        } else {
            at_now <= target
        };
        if beyond {
            return Reach::Beyond;
        }
        if !toward(fit.slope) {
            return Reach::Away;
        }
        let cross = |b: f64| fit.x_median + (target - fit.y_median) / b;
        let (steep, shallow) = if rising {
            (fit.high_slope, fit.low_slope)
        } else {
            (fit.low_slope, fit.high_slope)
        };
        Reach::At {
            at: cross(fit.slope),
            earliest: if toward(steep) {
                cross(steep)
            } else {
                cross(fit.slope)
            },
            latest: toward(shallow).then(|| cross(shallow)),
        }
    }
}

/// [`fit_trend`] and [`Projection::reach`] in one: the trend of `y` over
/// `x` and where it leads relative to `limit` at `now`.
pub fn project(
    x: &[f64],
    y: &[f64],
    growth: Growth,
    limit: f64,
    rising: bool,
    alpha: f64,
    now: f64,
) -> Result<(Projection, Reach), TrendError> {
    let p = fit_trend(x, y, growth, alpha)?;
    Ok((p, p.reach(limit, rising, now)))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Φ at points from a standard normal table (any statistics
    /// handbook; values to 4 decimals).
    #[test]
    fn normal_cdf_matches_the_table() {
        for (z, p) in [
            (0.0, 0.5),
            (1.0, 0.8413),
            (1.645, 0.9500),
            (1.96, 0.9750),
            (2.576, 0.9950),
            (-1.96, 0.0250),
        ] {
            assert!(
                (normal_cdf(z) - p).abs() < 5e-5,
                "Φ({z}) = {}",
                normal_cdf(z)
            );
        }
        assert!((normal_quantile(0.975) - 1.959_963_984_540_054).abs() < 1e-12);
        assert!((normal_quantile(0.025) + 1.959_963_984_540_054).abs() < 1e-12);
    }

    fn ramp(n: usize, slope: f64, noise: f64) -> (Vec<f64>, Vec<f64>) {
        // A fixed, irregular pseudo-noise (no RNG dependency).
        let x: Vec<f64> = (0..n).map(|i| i as f64 * 60.0).collect();
        let y = x
            .iter()
            .enumerate()
            .map(|(i, t)| 1.0 + slope * t + noise * (((i * 7919) % 13) as f64 - 6.0) / 6.0)
            .collect();
        (x, y)
    }

    #[test]
    fn no_trend_gives_no_time() {
        let (x, y) = ramp(40, 0.0, 0.5);
        let (p, reach) = project(&x, &y, Growth::Linear, 10.0, true, 0.05, 2400.0).expect("fit");
        assert_eq!(reach, Reach::NoSignificantTrend, "{p:?}");
    }

    #[test]
    fn falling_trend_and_low_limits() {
        let (x, y) = ramp(40, -1e-4, 0.01);
        let (p, reach) = project(&x, &y, Growth::Linear, 0.5, false, 0.05, 2340.0).expect("fit");
        let Reach::At { at, .. } = reach else {
            panic!("{p:?}")
        };
        // 1 − 1e-4 t = 0.5 at t = 5000 s.
        assert!((at - 5000.0).abs() < 100.0, "{at}");
        assert_eq!(p.reach(10.0, true, 2340.0), Reach::Away);
        assert_eq!(p.reach(0.9, false, 2340.0), Reach::Beyond);
    }

    #[test]
    fn bad_input_is_an_error() {
        assert_eq!(
            fit_trend(&[0.0; 5], &[1.0; 5], Growth::Linear, 0.05),
            Err(TrendError::TooFew(5))
        );
        let x: Vec<f64> = (0..12).map(f64::from).collect();
        let mut y = vec![1.0; 12];
        y[3] = f64::NAN;
        assert_eq!(
            fit_trend(&x, &y, Growth::Linear, 0.05),
            Err(TrendError::NotFinite(3))
        );
        y[3] = -1.0;
        assert_eq!(
            fit_trend(&x, &y, Growth::Exponential, 0.05),
            Err(TrendError::NotPositive(3))
        );
        assert_eq!(theil_sen(&[1.0; 12], &x, 0.95), Err(TrendError::NoSpread));
    }
}
