//! Reading the history file: the queries behind `/api/v1/history/…`
//! (docs/history.md "Queries") and the time to limit over stored
//! aggregates. Every function takes a connection (the HTTP side opens one
//! read-only per request with `schema::open_read`) and does no other I/O.
//!
//! - [`series_points`]: one series' aggregates between two times, merged
//!   into at most `points` buckets exactly as retention thins them (n
//!   summed, min of the minima, max of the maxima, mean weighted by n,
//!   the last value of the newest row that has one, the worst state), and
//!   the holes overlapping the range;
//! - [`list_spectra`], [`spectrum`], [`reference_of`]: stored spectra;
//! - [`waterfall`]: a channel's spectra in a range, cropped and decimated
//!   to display columns by the maximum ([`decimate_max`]), so every value
//!   given is a stored value and no local maximum is hidden under a lower
//!   neighbour;
//! - [`compare`]: two spectra line by line and band by band in dB.

use std::ops::Range;

use rusqlite::{params, Connection, OptionalExtension};

use super::codec::{self, CodecError};
use super::store::StoredBand;

/// Why a query could not be answered.
#[derive(Debug, thiserror::Error)]
pub enum QueryError {
    #[error("history file: {0}")]
    Sqlite(#[from] rusqlite::Error),
    #[error("channel {channel:?} has no stored series {series:?}")]
    UnknownSeries { channel: String, series: String },
    #[error("no stored spectrum {0}")]
    NoSpectrum(i64),
    #[error("stored spectrum {id}: column {column}: {source}")]
    Blob {
        id: i64,
        column: &'static str,
        #[source]
        source: CodecError,
    },
    #[error("stored spectrum {id}: column bands: {source}")]
    Bands {
        id: i64,
        #[source]
        source: serde_json::Error,
    },
    #[error("{what} has no envelope spectrum")]
    NoEnvelope { what: String },
    #[error(
        "{a} ({a_lines} lines at {a_rate_hz} Hz) and {b} ({b_lines} lines at {b_rate_hz} Hz) \
         cannot be compared line by line"
    )]
    Mismatch {
        a: String,
        a_lines: usize,
        a_rate_hz: f64,
        b: String,
        b_lines: usize,
        b_rate_hz: f64,
    },
}

// ---------------------------------------------------------------------------
// Aggregates
// ---------------------------------------------------------------------------

/// One row of the `points` table (or a merge of several).
#[derive(Debug, Clone, PartialEq)]
pub struct PointRow {
    /// Start, Unix seconds.
    pub t: i64,
    /// Seconds covered (from `t` to the end of the newest row merged).
    pub span: i64,
    pub n: i64,
    pub n_bad: i64,
    pub min: Option<f64>,
    pub mean: Option<f64>,
    pub max: Option<f64>,
    pub last: Option<f64>,
    pub state: Option<i64>,
}

/// A hole: records lost between two times (`channel` None: every channel).
#[derive(Debug, Clone, PartialEq)]
pub struct HoleRow {
    pub channel: Option<String>,
    pub t_from: i64,
    pub t_to: i64,
    pub reason: String,
    pub lost: i64,
}

/// A series' aggregates over a range.
#[derive(Debug, Clone, PartialEq)]
pub struct SeriesRows {
    /// "band" or "overall".
    pub kind: String,
    pub unit: String,
    /// Rows stored in the range (before merging).
    pub stored: usize,
    /// Oldest first; at most the `points` asked for.
    pub points: Vec<PointRow>,
    pub holes: Vec<HoleRow>,
}

/// Merges consecutive rows (oldest first) into one, as retention thins
/// (`store::retain`).
pub fn merge(rows: &[PointRow]) -> Option<PointRow> {
    let first = rows.first()?;
    let newest = rows.last()?;
    let n: i64 = rows.iter().map(|r| r.n).sum();
    let weighted: f64 = rows
        .iter()
        .filter_map(|r| r.mean.map(|m| m * r.n as f64))
        .sum();
    let extreme = |f: fn(&PointRow) -> Option<f64>, better: fn(f64, f64) -> bool| {
        rows.iter()
            .filter_map(f)
            .reduce(|a, b| if better(b, a) { b } else { a })
    };
    Some(PointRow {
        t: first.t,
        span: newest.t + newest.span - first.t,
        n,
        n_bad: rows.iter().map(|r| r.n_bad).sum(),
        min: extreme(|r| r.min, |a, b| a < b),
        mean: (n > 0).then(|| weighted / n as f64),
        max: extreme(|r| r.max, |a, b| a > b),
        last: rows.iter().rev().find_map(|r| r.last),
        state: rows.iter().filter_map(|r| r.state).max(),
    })
}

/// The rows of one series of `channel` whose interval starts in
/// `from_s ..= to_s`, merged into at most `points` buckets of consecutive
/// rows (each bucket `ceil(rows / points)` rows, the last one fewer), and
/// the holes of the channel (or of every channel) overlapping the range.
///
/// # Errors
/// No such series for the channel, or SQLite's error.
pub fn series_points(
    conn: &Connection,
    channel: &str,
    series: &str,
    from_s: i64,
    to_s: i64,
    points: usize,
) -> Result<SeriesRows, QueryError> {
    let found: Option<(i64, String, String)> = conn
        .query_row(
            "SELECT id, kind, unit FROM series WHERE channel = ?1 AND name = ?2",
            params![channel, series],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .optional()?;
    let Some((id, kind, unit)) = found else {
        return Err(QueryError::UnknownSeries {
            channel: channel.to_string(),
            series: series.to_string(),
        });
    };
    let mut stmt = conn.prepare_cached(
        "SELECT t, span, n, n_bad, min, mean, max, last, state FROM points
         WHERE series = ?1 AND t >= ?2 AND t <= ?3 ORDER BY t",
    )?;
    let rows: Vec<PointRow> = stmt
        .query_map(params![id, from_s, to_s], |r| {
            Ok(PointRow {
                t: r.get(0)?,
                span: r.get(1)?,
                n: r.get(2)?,
                n_bad: r.get(3)?,
                min: r.get(4)?,
                mean: r.get(5)?,
                max: r.get(6)?,
                last: r.get(7)?,
                state: r.get(8)?,
            })
        })?
        .collect::<Result<_, _>>()?;
    let stored = rows.len();
    let k = stored.div_ceil(points.max(1)).max(1);
    let merged = if k == 1 {
        rows
    } else {
        rows.chunks(k).filter_map(merge).collect()
    };
    Ok(SeriesRows {
        kind,
        unit,
        stored,
        points: merged,
        holes: holes(conn, channel, from_s, to_s)?,
    })
}

/// The holes of `channel` (and those of every channel) overlapping
/// `from_s ..= to_s`, oldest first.
///
/// # Errors
/// SQLite's error.
pub fn holes(
    conn: &Connection,
    channel: &str,
    from_s: i64,
    to_s: i64,
) -> Result<Vec<HoleRow>, QueryError> {
    let mut stmt = conn.prepare_cached(
        "SELECT channel, t_from, t_to, reason, lost FROM holes
         WHERE t_to >= ?2 AND t_from <= ?3 AND (channel = ?1 OR channel IS NULL)
         ORDER BY t_from, id",
    )?;
    let out = stmt
        .query_map(params![channel, from_s, to_s], |r| {
            Ok(HoleRow {
                channel: r.get(0)?,
                t_from: r.get(1)?,
                t_to: r.get(2)?,
                reason: r.get(3)?,
                lost: r.get(4)?,
            })
        })?
        .collect::<Result<_, _>>()?;
    Ok(out)
}

/// The stored series of a channel: (name, kind, unit), by name.
///
/// # Errors
/// SQLite's error.
pub fn series_of(
    conn: &Connection,
    channel: &str,
) -> Result<Vec<(String, String, String)>, QueryError> {
    let mut stmt = conn
        .prepare_cached("SELECT name, kind, unit FROM series WHERE channel = ?1 ORDER BY name")?;
    let out = stmt
        .query_map([channel], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?
        .collect::<Result<_, _>>()?;
    Ok(out)
}

/// The per-interval extremes of a series the time to limit fits: (Unix
/// seconds of the row, its `max` for a high limit or its `min`), rows
/// starting at or after `from_s` that have one, oldest first. Empty when
/// the series is not stored.
///
/// # Errors
/// SQLite's error.
pub fn extremes(
    conn: &Connection,
    channel: &str,
    series: &str,
    from_s: i64,
    high: bool,
) -> Result<Vec<(f64, f64)>, QueryError> {
    let col = if high { "max" } else { "min" };
    let mut stmt = conn.prepare_cached(&format!(
        "SELECT p.t, p.{col} FROM points p JOIN series s ON s.id = p.series
         WHERE s.channel = ?1 AND s.name = ?2 AND p.t >= ?3 AND p.{col} IS NOT NULL
         ORDER BY p.t"
    ))?;
    let out = stmt
        .query_map(params![channel, series, from_s], |r| {
            Ok((r.get::<_, i64>(0)? as f64, r.get::<_, f64>(1)?))
        })?
        .collect::<Result<_, _>>()?;
    Ok(out)
}

// ---------------------------------------------------------------------------
// Spectra
// ---------------------------------------------------------------------------

/// A stored spectrum as listed (no lines).
#[derive(Debug, Clone, PartialEq)]
pub struct SpectrumListing {
    pub id: i64,
    pub t_ns: i64,
    pub reason: String,
    pub event: Option<String>,
    pub reference: bool,
    pub averages: i64,
    pub lines: i64,
    pub bytes: i64,
}

/// The spectra of `channel` whose time is in `from_ns ..= to_ns`, newest
/// first, at most `limit`.
///
/// # Errors
/// SQLite's error.
pub fn list_spectra(
    conn: &Connection,
    channel: &str,
    from_ns: i64,
    to_ns: i64,
    limit: usize,
) -> Result<Vec<SpectrumListing>, QueryError> {
    let mut stmt = conn.prepare_cached(
        "SELECT id, t_ns, reason, event, reference, averages, lines, bytes FROM spectra
         WHERE channel = ?1 AND t_ns >= ?2 AND t_ns <= ?3 ORDER BY t_ns DESC, id DESC LIMIT ?4",
    )?;
    let out = stmt
        .query_map(
            params![channel, from_ns, to_ns, limit.min(i64::MAX as usize) as i64],
            |r| {
                Ok(SpectrumListing {
                    id: r.get(0)?,
                    t_ns: r.get(1)?,
                    reason: r.get(2)?,
                    event: r.get(3)?,
                    reference: r.get::<_, i64>(4)? != 0,
                    averages: r.get(5)?,
                    lines: r.get(6)?,
                    bytes: r.get(7)?,
                })
            },
        )?
        .collect::<Result<_, _>>()?;
    Ok(out)
}

/// One stored spectrum, every column, the lines decoded.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredSpectrum {
    pub id: i64,
    pub channel: String,
    pub t_ns: i64,
    pub published_ns: i64,
    pub reason: String,
    pub event: Option<String>,
    pub reference: bool,
    pub unit: String,
    pub sample_rate_hz: f64,
    pub block: i64,
    pub nfft: i64,
    pub window: String,
    pub enbw_bins: f64,
    pub averaging: String,
    pub averages: i64,
    pub first_sample: i64,
    pub oldest_first_sample: i64,
    pub integration_low_cut_hz: f64,
    pub speed_hz: Option<f64>,
    pub lines: i64,
    /// Power per line, the channel's unit².
    pub power: Vec<f32>,
    /// Empty without envelope analysis.
    pub envelope: Vec<f32>,
    pub bands: Vec<StoredBand>,
    pub bytes: i64,
}

impl StoredSpectrum {
    /// The lines of the raw or the envelope spectrum.
    ///
    /// # Errors
    /// The envelope of a spectrum stored without one.
    pub fn lines_of(&self, envelope: bool) -> Result<&[f32], QueryError> {
        if !envelope {
            return Ok(&self.power);
        }
        if self.envelope.is_empty() {
            return Err(QueryError::NoEnvelope {
                what: format!("stored spectrum {}", self.id),
            });
        }
        Ok(&self.envelope)
    }
}

const SPECTRUM_COLUMNS: &str = "id, channel, t_ns, published_ns, reason, event, reference, \
    unit, sample_rate_hz, block, nfft, window, enbw_bins, averaging, averages, first_sample, \
    oldest_first_sample, integration_low_cut_hz, speed_hz, lines, power, envelope, bands, bytes";

fn spectrum_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<(StoredSpectrum, RawLines)> {
    Ok((
        StoredSpectrum {
            id: r.get(0)?,
            channel: r.get(1)?,
            t_ns: r.get(2)?,
            published_ns: r.get(3)?,
            reason: r.get(4)?,
            event: r.get(5)?,
            reference: r.get::<_, i64>(6)? != 0,
            unit: r.get(7)?,
            sample_rate_hz: r.get(8)?,
            block: r.get(9)?,
            nfft: r.get(10)?,
            window: r.get(11)?,
            enbw_bins: r.get(12)?,
            averaging: r.get(13)?,
            averages: r.get(14)?,
            first_sample: r.get(15)?,
            oldest_first_sample: r.get(16)?,
            integration_low_cut_hz: r.get(17)?,
            speed_hz: r.get(18)?,
            lines: r.get(19)?,
            power: Vec::new(),
            envelope: Vec::new(),
            bands: Vec::new(),
            bytes: r.get(23)?,
        },
        RawLines {
            power: r.get(20)?,
            envelope: r.get(21)?,
            bands: r.get(22)?,
        },
    ))
}

/// The BLOBs and JSON of a row, decoded after the statement is done.
struct RawLines {
    power: Vec<u8>,
    envelope: Option<Vec<u8>>,
    bands: String,
}

impl RawLines {
    fn decode_into(self, s: &mut StoredSpectrum) -> Result<(), QueryError> {
        let id = s.id;
        s.power = codec::decode(&self.power).map_err(|source| QueryError::Blob {
            id,
            column: "power",
            source,
        })?;
        s.envelope = match self.envelope {
            Some(b) => codec::decode(&b).map_err(|source| QueryError::Blob {
                id,
                column: "envelope",
                source,
            })?,
            None => Vec::new(),
        };
        s.bands =
            serde_json::from_str(&self.bands).map_err(|source| QueryError::Bands { id, source })?;
        Ok(())
    }
}

/// Stored spectrum `id`.
///
/// # Errors
/// No such id, a damaged BLOB or bands column, SQLite's error.
pub fn spectrum(conn: &Connection, id: i64) -> Result<StoredSpectrum, QueryError> {
    let row = conn
        .query_row(
            &format!("SELECT {SPECTRUM_COLUMNS} FROM spectra WHERE id = ?1"),
            [id],
            spectrum_row,
        )
        .optional()?;
    let Some((mut s, raw)) = row else {
        return Err(QueryError::NoSpectrum(id));
    };
    raw.decode_into(&mut s)?;
    Ok(s)
}

/// The id of the channel's marked reference spectrum, if any.
///
/// # Errors
/// SQLite's error.
pub fn reference_of(conn: &Connection, channel: &str) -> Result<Option<i64>, QueryError> {
    Ok(conn
        .query_row(
            "SELECT id FROM spectra WHERE channel = ?1 AND reference <> 0 ORDER BY id DESC LIMIT 1",
            [channel],
            |r| r.get(0),
        )
        .optional()?)
}

// ---------------------------------------------------------------------------
// Waterfall
// ---------------------------------------------------------------------------

/// The lines of each display column when `lines` lines are shown in at
/// most `columns` columns: one line a column when they fit, else
/// `columns` runs of consecutive lines, their lengths differing by at
/// most one (column j holds lines ⌊j·L/C⌋ .. ⌊(j+1)·L/C⌋).
pub fn column_lines(lines: usize, columns: usize) -> Vec<Range<usize>> {
    let c = columns.max(1);
    if lines <= c {
        return (0..lines).map(|i| i..i + 1).collect();
    }
    (0..c).map(|j| j * lines / c..(j + 1) * lines / c).collect()
}

/// `row` shown in at most `columns` columns: each column the largest of
/// its lines (the first of equal ones; a NaN line never wins over a
/// number). Every value out is one of `row`'s values, bit for bit.
pub fn decimate_max(row: &[f32], columns: usize) -> Vec<f32> {
    column_lines(row.len(), columns)
        .into_iter()
        .map(|r| {
            row[r]
                .iter()
                .copied()
                .reduce(|best, v| if v > best || best.is_nan() { v } else { best })
                .unwrap_or(f32::NAN)
        })
        .collect()
}

/// The indices of `n` items kept when at most `max` may be: all of them,
/// or `max` spread evenly from the first to the last.
pub fn pick_evenly(n: usize, max: usize) -> Vec<usize> {
    if n <= max {
        return (0..n).collect();
    }
    match max {
        0 => Vec::new(),
        1 => vec![n - 1],
        m => (0..m)
            .map(|i| (i * (n - 1) + (m - 1) / 2) / (m - 1))
            .collect(),
    }
}

/// One row of a waterfall.
#[derive(Debug, Clone, PartialEq)]
pub struct WaterfallRow {
    pub id: i64,
    pub t_ns: i64,
    /// Power per column (a stored line's value).
    pub values: Vec<f32>,
}

/// A waterfall: the rows oldest first, all of the same analysis
/// (sample rate and line count: those of the newest spectrum in range).
#[derive(Debug, Clone, PartialEq)]
pub struct Waterfall {
    pub sample_rate_hz: f64,
    pub nfft: i64,
    pub df_hz: f64,
    /// The newest spectrum's settings, for the scaling.
    pub unit: String,
    pub block: i64,
    pub enbw_bins: f64,
    /// The cropped lines, first and last.
    pub first_line: usize,
    pub last_line: usize,
    /// Per column, its first and last line (relative to line 0).
    pub columns: Vec<(usize, usize)>,
    pub rows: Vec<WaterfallRow>,
    /// Spectra in the range.
    pub in_range: usize,
    /// Spectra left out because their analysis differs from the newest's.
    pub other_analysis: usize,
}

/// What a waterfall asks for.
#[derive(Debug, Clone, Copy)]
pub struct WaterfallAsk {
    pub from_ns: i64,
    pub to_ns: i64,
    pub fmin_hz: Option<f64>,
    pub fmax_hz: Option<f64>,
    pub columns: usize,
    pub envelope: bool,
    pub max_spectra: usize,
}

/// Why a frequency crop holds no line.
fn crop(
    fmin: Option<f64>,
    fmax: Option<f64>,
    df: f64,
    lines: usize,
) -> Option<std::ops::RangeInclusive<usize>> {
    let last = lines.checked_sub(1)?;
    let first_line = fmin.map_or(0.0, |f| (f / df - 1e-9).ceil().max(0.0)) as usize;
    let last_line = fmax.map_or(last as f64, |f| (f / df + 1e-9).floor().max(0.0)) as usize;
    let last_line = last_line.min(last);
    (first_line <= last_line).then_some(first_line..=last_line)
}

/// The waterfall of `channel` (module docs). `Ok(None)` when no stored
/// spectrum is in the range.
///
/// # Errors
/// A damaged row, no envelope on the newest spectrum when asked, a crop
/// without a line (`Mismatch` is never returned here), SQLite's error.
pub fn waterfall(
    conn: &Connection,
    channel: &str,
    ask: &WaterfallAsk,
) -> Result<Option<Waterfall>, QueryError> {
    let mut stmt = conn.prepare_cached(
        "SELECT id, t_ns, sample_rate_hz, lines, nfft FROM spectra
         WHERE channel = ?1 AND t_ns >= ?2 AND t_ns <= ?3 ORDER BY t_ns, id",
    )?;
    let all: Vec<(i64, i64, f64, i64, i64)> = stmt
        .query_map(params![channel, ask.from_ns, ask.to_ns], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
        })?
        .collect::<Result<_, _>>()?;
    let Some(&(newest_id, _, rate, lines, _)) = all.last() else {
        return Ok(None);
    };
    let newest = spectrum(conn, newest_id)?;
    let newest_lines = newest.lines_of(ask.envelope)?.len();
    let same: Vec<i64> = all
        .iter()
        .filter(|r| r.2 == rate && r.3 == lines)
        .map(|r| r.0)
        .collect();
    let other_analysis = all.len() - same.len();
    let df = rate / newest.nfft.max(1) as f64;
    let Some(range) = crop(ask.fmin_hz, ask.fmax_hz, df, newest_lines) else {
        return Ok(Some(Waterfall {
            sample_rate_hz: rate,
            nfft: newest.nfft,
            df_hz: df,
            unit: newest.unit.clone(),
            block: newest.block,
            enbw_bins: newest.enbw_bins,
            first_line: 0,
            last_line: 0,
            columns: Vec::new(),
            rows: Vec::new(),
            in_range: all.len(),
            other_analysis,
        }));
    };
    let (first, last) = (*range.start(), *range.end());
    let columns: Vec<(usize, usize)> = column_lines(last - first + 1, ask.columns)
        .into_iter()
        .map(|r| (first + r.start, first + r.end - 1))
        .collect();
    let mut rows = Vec::new();
    for i in pick_evenly(same.len(), ask.max_spectra) {
        let s = spectrum(conn, same[i])?;
        let lines = match s.lines_of(ask.envelope) {
            Ok(l) => l,
            // A spectrum stored while envelope analysis was off.
            Err(_) => continue,
        };
        let Some(cropped) = lines.get(first..=last) else {
            continue;
        };
        rows.push(WaterfallRow {
            id: s.id,
            t_ns: s.t_ns,
            values: decimate_max(cropped, ask.columns),
        });
    }
    Ok(Some(Waterfall {
        sample_rate_hz: rate,
        nfft: newest.nfft,
        df_hz: df,
        unit: newest.unit.clone(),
        block: newest.block,
        enbw_bins: newest.enbw_bins,
        first_line: first,
        last_line: last,
        columns,
        rows,
        in_range: all.len(),
        other_analysis,
    }))
}

// ---------------------------------------------------------------------------
// Compare
// ---------------------------------------------------------------------------

/// One side of a comparison.
#[derive(Debug, Clone, Copy)]
pub struct Side<'a> {
    /// How errors name it ("stored spectrum 12", "the live spectrum").
    pub what: &'a str,
    pub sample_rate_hz: f64,
    /// Power per line.
    pub lines: &'a [f32],
    pub bands: &'a [StoredBand],
}

/// One band compared.
#[derive(Debug, Clone, PartialEq)]
pub struct BandCompared {
    pub name: String,
    pub unit: String,
    pub value: Option<f64>,
    pub reference: Option<f64>,
    /// 20·log10(value / reference) (band values are amplitudes); None
    /// when either is missing or not above zero.
    pub db: Option<f64>,
}

/// Two spectra compared.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// Per line, 10·log10(power / reference power); None where either
    /// line is zero, negative or not finite.
    pub db: Vec<Option<f64>>,
    /// The bands of `of`, each with the reference's band of the same name.
    pub bands: Vec<BandCompared>,
}

/// 10·log10(a / b) for powers, None unless both are finite and above zero.
pub fn power_db(a: f64, b: f64) -> Option<f64> {
    (a.is_finite() && b.is_finite() && a > 0.0 && b > 0.0).then(|| 10.0 * (a / b).log10())
}

/// 20·log10(a / b) for amplitudes, None unless both are finite and above zero.
pub fn amplitude_db(a: f64, b: f64) -> Option<f64> {
    power_db(a, b).map(|p| 2.0 * p)
}

/// `of` against `reference`, line by line and band by band.
///
/// # Errors
/// Different line counts or sample rates (`Mismatch`, naming both).
pub fn compare(of: &Side<'_>, reference: &Side<'_>) -> Result<Comparison, QueryError> {
    if of.lines.len() != reference.lines.len() || of.sample_rate_hz != reference.sample_rate_hz {
        return Err(QueryError::Mismatch {
            a: of.what.to_string(),
            a_lines: of.lines.len(),
            a_rate_hz: of.sample_rate_hz,
            b: reference.what.to_string(),
            b_lines: reference.lines.len(),
            b_rate_hz: reference.sample_rate_hz,
        });
    }
    let db = of
        .lines
        .iter()
        .zip(reference.lines)
        .map(|(&a, &b)| power_db(f64::from(a), f64::from(b)))
        .collect();
    let bands = of
        .bands
        .iter()
        .map(|b| {
            let r = reference
                .bands
                .iter()
                .find(|r| r.name == b.name && r.unit == b.unit)
                .and_then(|r| r.value);
            BandCompared {
                name: b.name.clone(),
                unit: b.unit.clone(),
                value: b.value,
                reference: r,
                db: b.value.zip(r).and_then(|(a, r)| amplitude_db(a, r)),
            }
        })
        .collect();
    Ok(Comparison { db, bands })
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use proptest::prelude::*;

    use super::*;
    use crate::config::fixture::{Channel, Fixture, Source};
    use crate::config::ChannelSpec;
    use crate::dsp::bands::{BandStatus, BandValue};
    use crate::history::store::{self, SeriesIds};
    use crate::history::{schema, Aggregate, IntervalRecord, SpectrumRecord, StoreReason};

    fn spec() -> Arc<ChannelSpec> {
        let cfg = crate::config::parse_str(
            &Fixture::new()
                .source(Source::new("sim", "sim"))
                .channel(
                    Channel::new("p2-de", "sim", 0)
                        .block(256)
                        .band("v", 50.0, 150.0),
                )
                .toml(),
        )
        .expect("config");
        Arc::new(cfg.channels[0].clone())
    }

    struct Temp(std::path::PathBuf);
    impl Drop for Temp {
        fn drop(&mut self) {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }

    fn temp(name: &str) -> (Temp, Connection) {
        let dir = std::env::temp_dir().join(format!("bw-query-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("dir");
        let conn = schema::open_write(&dir.join("h.sqlite")).expect("open");
        (Temp(dir), conn)
    }

    fn agg(values: &[f64], state: Option<i8>) -> Aggregate {
        let mut a = Aggregate::default();
        for &v in values {
            a.add(v, state);
        }
        a
    }

    fn interval(conn: &mut Connection, spec: &Arc<ChannelSpec>, t_s: u64, band: Aggregate) {
        let mut series = vec![agg(&[1.0], Some(0)); 5];
        series.push(band);
        let tx = conn.transaction().expect("tx");
        store::insert_interval(
            &tx,
            &mut SeriesIds::default(),
            &IntervalRecord {
                spec: spec.clone(),
                t_s,
                span_s: 60,
                series,
                lost: None,
            },
        )
        .expect("insert");
        tx.commit().expect("commit");
    }

    fn record(spec: &Arc<ChannelSpec>, t_s: u64, power: Vec<f32>, band: f64) -> SpectrumRecord {
        SpectrumRecord {
            spec: spec.clone(),
            enbw_bins: 1.5,
            reason: StoreReason::Interval,
            event: None,
            t_ns: t_s * 1_000_000_000,
            published_ns: t_s * 1_000_000_000 + 5,
            averages: 4,
            first_sample: 1024,
            oldest_first_sample: 640,
            speed_hz: None,
            power,
            envelope: Vec::new(),
            bands: vec![BandValue {
                value: band,
                peak_hz: 100.0,
                lo_hz: 50.0,
                hi_hz: 150.0,
                status: BandStatus::Ok,
            }],
            lost: None,
        }
    }

    /// Four intervals merged in twos: the merge rules of retention
    /// (`store::retain`, module docs there), worked by hand.
    #[test]
    fn series_rows_merge_as_retention_thins() {
        let (_t, mut conn) = temp("series");
        let s = spec();
        interval(&mut conn, &s, 600, agg(&[1.0, 3.0], Some(0)));
        interval(&mut conn, &s, 660, agg(&[5.0], Some(1)));
        interval(&mut conn, &s, 720, agg(&[], None));
        interval(&mut conn, &s, 780, agg(&[2.0, 2.0, 8.0], Some(-1)));
        store::insert_hole(&conn, Some("p2-de"), 700, 720, "queue_full", 3).expect("hole");
        store::insert_hole(&conn, Some("other"), 700, 720, "queue_full", 3).expect("hole");
        store::insert_hole(&conn, None, 5000, 6000, "write_error", 1).expect("hole");
        let all = series_points(&conn, "p2-de", "v", 0, 10_000, 10).expect("rows");
        assert_eq!(
            (all.kind.as_str(), all.stored, all.points.len()),
            ("band", 4, 4)
        );
        assert_eq!(all.points[2].n, 0);
        assert_eq!(all.points[2].min, None);
        let two = series_points(&conn, "p2-de", "v", 0, 10_000, 2).expect("rows");
        assert_eq!(two.points.len(), 2);
        let a = &two.points[0];
        // n 2 + 1; min(1, 5) = 1; max(3, 5) = 5; mean (2·2 + 1·5) / 3 = 3;
        // last of the newest row with one: 5; worst state 1.
        assert_eq!(
            (a.t, a.span, a.n, a.min, a.max, a.last, a.state),
            (600, 120, 3, Some(1.0), Some(5.0), Some(5.0), Some(1))
        );
        assert!((a.mean.expect("mean") - 3.0).abs() < 1e-12);
        let b = &two.points[1];
        // The empty row adds nothing but its n_bad (0) and its span.
        assert_eq!(
            (b.t, b.span, b.n, b.min, b.max, b.last, b.state),
            (720, 120, 3, Some(2.0), Some(8.0), Some(8.0), Some(-1))
        );
        assert!((b.mean.expect("mean") - 4.0).abs() < 1e-12);
        // Holes: this channel's and the all-channel one, not another's.
        assert_eq!(two.holes.len(), 2, "{:?}", two.holes);
        assert_eq!(two.holes[0].channel.as_deref(), Some("p2-de"));
        assert_eq!(two.holes[1].channel, None);
        // A range: the rows starting in it.
        let mid = series_points(&conn, "p2-de", "v", 650, 720, 10).expect("rows");
        assert_eq!(
            mid.points.iter().map(|p| p.t).collect::<Vec<_>>(),
            [660, 720]
        );
        assert_eq!(mid.holes.len(), 1);
        assert!(matches!(
            series_points(&conn, "p2-de", "nope", 0, 1, 1),
            Err(QueryError::UnknownSeries { .. })
        ));
        let hi = extremes(&conn, "p2-de", "v", 0, true).expect("extremes");
        assert_eq!(hi, [(600.0, 3.0), (660.0, 5.0), (780.0, 8.0)]);
        let lo = extremes(&conn, "p2-de", "v", 650, false).expect("extremes");
        assert_eq!(lo, [(660.0, 5.0), (780.0, 2.0)]);
    }

    #[test]
    fn spectra_list_read_reference_and_compare() {
        let (_t, mut conn) = temp("spectra");
        let s = spec();
        let lines = s.bins();
        let p1: Vec<f32> = (0..lines).map(|i| i as f32 * 0.25).collect();
        let p2: Vec<f32> = (0..lines).map(|i| i as f32).collect();
        let a = store::insert_spectrum(&conn, &record(&s, 1000, p1.clone(), 2.0)).expect("a");
        let b = store::insert_spectrum(&conn, &record(&s, 2000, p2.clone(), 4.0)).expect("b");
        let listed = list_spectra(&conn, "p2-de", 0, i64::MAX, 10).expect("list");
        assert_eq!(listed.iter().map(|l| l.id).collect::<Vec<_>>(), [b, a]);
        assert_eq!(listed[0].lines, lines as i64);
        let one = list_spectra(&conn, "p2-de", 0, i64::MAX, 1).expect("list");
        assert_eq!(one.len(), 1);
        let got = spectrum(&conn, a).expect("spectrum");
        assert_eq!(got.power, p1);
        assert_eq!(got.block, 256);
        assert_eq!(got.bands[0].value, Some(2.0));
        assert!(got.lines_of(true).is_err());
        assert!(matches!(
            spectrum(&conn, 999),
            Err(QueryError::NoSpectrum(999))
        ));
        assert_eq!(reference_of(&conn, "p2-de").expect("ref"), None);
        store::mark_reference(&mut conn, a).expect("mark");
        assert_eq!(reference_of(&conn, "p2-de").expect("ref"), Some(a));
        let ref_s = spectrum(&conn, a).expect("a");
        let of_s = spectrum(&conn, b).expect("b");
        fn side<'a>(s: &'a StoredSpectrum, what: &'a str) -> Side<'a> {
            Side {
                what,
                sample_rate_hz: s.sample_rate_hz,
                lines: &s.power,
                bands: &s.bands,
            }
        }
        let c = compare(&side(&of_s, "b"), &side(&ref_s, "a")).expect("compare");
        // Line 0: both zero: null. Others: power ratio 4: 10·log10 4.
        assert_eq!(c.db[0], None);
        for d in &c.db[1..] {
            assert!((d.expect("db") - 10.0 * 4f64.log10()).abs() < 1e-6);
        }
        // Band amplitudes 4 vs 2: 20·log10 2 ≈ 6.0206 dB.
        assert!((c.bands[0].db.expect("db") - 20.0 * 2f64.log10()).abs() < 1e-12);
        let short = [0.0f32; 3];
        let err = compare(
            &Side {
                what: "the live spectrum",
                sample_rate_hz: 25_600.0,
                lines: &short,
                bands: &[],
            },
            &side(&ref_s, "stored spectrum 1"),
        )
        .expect_err("mismatch");
        let msg = err.to_string();
        assert!(
            msg.contains("the live spectrum (3 lines")
                && msg.contains("stored spectrum 1 (129 lines"),
            "{msg}"
        );
    }

    #[test]
    fn waterfall_values_are_the_stored_lines_bit_for_bit() {
        let (_t, conn) = temp("waterfall");
        let s = spec();
        let lines = s.bins();
        let mut rng = 0x2545_f491_4f6c_dd1du64;
        let mut stored = Vec::new();
        for k in 0..5u64 {
            let p: Vec<f32> = (0..lines)
                .map(|_| {
                    rng ^= rng << 13;
                    rng ^= rng >> 7;
                    rng ^= rng << 17;
                    f32::from_bits((rng as u32) & 0x3fff_ffff)
                })
                .collect();
            store::insert_spectrum(&conn, &record(&s, 100 + k, p.clone(), 1.0)).expect("insert");
            stored.push(p);
        }
        let ask = WaterfallAsk {
            from_ns: 0,
            to_ns: i64::MAX,
            fmin_hz: Some(1000.0),
            fmax_hz: Some(5000.0),
            columns: 1000,
            envelope: false,
            max_spectra: 100,
        };
        let w = waterfall(&conn, "p2-de", &ask).expect("ok").expect("rows");
        // df = 25 600 / 256 = 100 Hz: lines 10 ..= 50.
        assert_eq!((w.first_line, w.last_line), (10, 50));
        assert_eq!(w.rows.len(), 5);
        for (row, p) in w.rows.iter().zip(&stored) {
            let want: Vec<u32> = p[10..=50].iter().map(|v| v.to_bits()).collect();
            let got: Vec<u32> = row.values.iter().map(|v| v.to_bits()).collect();
            assert_eq!(got, want);
        }
        let few = waterfall(
            &conn,
            "p2-de",
            &WaterfallAsk {
                columns: 7,
                max_spectra: 3,
                ..ask
            },
        )
        .expect("ok")
        .expect("rows");
        // 5 spectra, 3 kept: the first, the middle and the last.
        assert_eq!(
            few.rows
                .iter()
                .map(|r| r.t_ns / 1_000_000_000)
                .collect::<Vec<_>>(),
            [100, 102, 104]
        );
        for row in &few.rows {
            assert_eq!(row.values.len(), 7);
        }
        assert!(waterfall(&conn, "other", &ask).expect("ok").is_none());
    }

    #[test]
    fn even_picks() {
        assert_eq!(pick_evenly(3, 5), [0, 1, 2]);
        assert_eq!(pick_evenly(10, 1), [9]);
        assert_eq!(pick_evenly(11, 3), [0, 5, 10]);
        assert_eq!(column_lines(5, 2), [0..2, 2..5]);
    }

    proptest! {
        /// Every local maximum of the row (a line not below its
        /// neighbours) survives: its column shows a value at least as
        /// large, and every column's value is one of its own lines.
        #[test]
        fn decimation_keeps_every_local_maximum(
            row in proptest::collection::vec(0.0f32..1e6, 1..600),
            columns in 1usize..300,
        ) {
            let out = decimate_max(&row, columns);
            let cols = column_lines(row.len(), columns);
            prop_assert_eq!(out.len(), cols.len());
            prop_assert!(out.len() <= columns.max(1));
            for (c, r) in cols.iter().enumerate() {
                prop_assert!(row[r.clone()].iter().any(|v| v.to_bits() == out[c].to_bits()));
                for i in r.clone() {
                    let left = i == 0 || row[i] >= row[i - 1];
                    let right = i + 1 == row.len() || row[i] >= row[i + 1];
                    if left && right {
                        prop_assert!(out[c] >= row[i], "line {} in column {}", i, c);
                    }
                }
            }
        }
    }
}
