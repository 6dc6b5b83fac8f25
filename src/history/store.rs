//! Writing to the history file and keeping it bounded: the statements the
//! writer thread (and an operator's request) run on a connection, and the
//! retention that deletes, thins and hands pages back.
//!
//! Retention (run by the writer every few minutes, and testable with any
//! `now`, so a year can be simulated in seconds):
//! 1. aggregates older than `keep_days` are deleted;
//! 2. aggregates older than `thin_after_days` are merged into one row per
//!    series per hour: n and n_bad summed, min of the minima, max of the
//!    maxima, the mean weighted by n, the last of the hour's last values,
//!    the worst state;
//! 3. holes older than `keep_days` are deleted;
//! 4. spectra older than `spectra_keep_days` are deleted, except
//!    references and spectra stored at an alarm transition;
//! 5. while the file's pages in use exceed `max_mb`, the oldest such
//!    spectra go, a batch at a time;
//! 6. freed pages are returned to the file system (`incremental_vacuum`).

use std::collections::HashMap;

use rusqlite::{params, Connection, OptionalExtension, Transaction};
use serde::Serialize;

use super::schema::OVERALL_SERIES;
use super::{codec, IntervalRecord, SpectrumRecord};
use crate::config::history::THIN_SPAN_S;
use crate::config::HistorySpec;

/// Series ids by (channel, series name), so a record costs no lookup.
#[derive(Debug, Default)]
pub struct SeriesIds(HashMap<(String, String), i64>);

impl SeriesIds {
    fn get(
        &mut self,
        tx: &Transaction<'_>,
        channel: &str,
        name: &str,
        kind: &str,
        unit: &str,
    ) -> rusqlite::Result<i64> {
        if let Some(id) = self.0.get(&(channel.to_string(), name.to_string())) {
            return Ok(*id);
        }
        tx.execute(
            "INSERT INTO series (channel, name, kind, unit) VALUES (?1, ?2, ?3, ?4)
             ON CONFLICT (channel, name) DO UPDATE SET kind = ?3, unit = ?4",
            params![channel, name, kind, unit],
        )?;
        let id: i64 = tx.query_row(
            "SELECT id FROM series WHERE channel = ?1 AND name = ?2",
            params![channel, name],
            |r| r.get(0),
        )?;
        self.0.insert((channel.to_string(), name.to_string()), id);
        Ok(id)
    }

    /// Forget every id (after a failed transaction rolled back inserts).
    pub fn clear(&mut self) {
        self.0.clear();
    }
}

fn opt(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// Writes one channel's interval: one row per series. Returns the rows.
///
/// # Errors
/// SQLite's error (disk full, read-only, …).
pub fn insert_interval(
    tx: &Transaction<'_>,
    ids: &mut SeriesIds,
    r: &IntervalRecord,
) -> rusqlite::Result<u64> {
    let spec = &r.spec;
    let mut stmt = tx.prepare_cached(
        "INSERT OR REPLACE INTO points (series, t, span, n, n_bad, min, mean, max, last, state)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
    )?;
    let mut rows = 0;
    for (i, a) in r.series.iter().enumerate() {
        let (name, kind, unit) = match i.checked_sub(OVERALL_SERIES.len()) {
            None => (
                OVERALL_SERIES[i],
                "overall",
                if OVERALL_SERIES[i] == "overall-crest-factor" {
                    ""
                } else {
                    spec.unit.symbol
                },
            ),
            Some(b) => match spec.bands.get(b) {
                Some(band) => (band.name.as_str(), "band", band.unit.symbol),
                None => continue,
            },
        };
        let id = ids.get(tx, &spec.name, name, kind, unit)?;
        let mean = if a.n > 0 {
            a.sum / f64::from(a.n)
        } else {
            f64::NAN
        };
        let ok = a.n > 0;
        stmt.execute(params![
            id,
            r.t_s as i64,
            r.span_s,
            a.n,
            a.n_bad,
            if ok { opt(a.min) } else { None },
            opt(mean),
            if ok { opt(a.max) } else { None },
            opt(a.last),
            a.state,
        ])?;
        rows += 1;
    }
    Ok(rows)
}

/// A band's value as stored with a spectrum (the `bands` column's JSON).
#[derive(Debug, Clone, Serialize, serde::Deserialize, PartialEq)]
pub struct StoredBand {
    pub name: String,
    pub unit: String,
    /// Null when not ok.
    pub value: Option<f64>,
    pub status: String,
    pub peak_hz: Option<f64>,
}

/// Writes one spectrum; returns its id.
///
/// # Errors
/// SQLite's error.
pub fn insert_spectrum(conn: &Connection, r: &SpectrumRecord) -> rusqlite::Result<i64> {
    let spec = &r.spec;
    let power = codec::encode(&r.power);
    let envelope = (!r.envelope.is_empty()).then(|| codec::encode(&r.envelope));
    let bands: Vec<StoredBand> = spec
        .bands
        .iter()
        .zip(&r.bands)
        .map(|(b, v)| StoredBand {
            name: b.name.clone(),
            unit: b.unit.symbol.to_string(),
            value: v.is_ok().then_some(v.value).and_then(opt),
            status: v.status.as_str().to_string(),
            peak_hz: v.is_ok().then_some(v.peak_hz).and_then(opt),
        })
        .collect();
    let bands = serde_json::to_string(&bands).unwrap_or_else(|_| "[]".into());
    let bytes = power.len() + envelope.as_ref().map_or(0, Vec::len);
    conn.prepare_cached(
        "INSERT INTO spectra (channel, t_ns, published_ns, reason, event, reference, unit,
            sample_rate_hz, block, nfft, window, enbw_bins, averaging, averages, first_sample,
            oldest_first_sample, integration_low_cut_hz, speed_hz, lines, power, envelope,
            bands, bytes)
         VALUES (?1, ?2, ?3, ?4, ?5, 0, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16,
            ?17, ?18, ?19, ?20, ?21, ?22)",
    )?
    .execute(params![
        spec.name,
        r.t_ns as i64,
        r.published_ns as i64,
        r.reason.as_str(),
        r.event,
        spec.unit.symbol,
        spec.sample_rate_hz,
        spec.block as i64,
        spec.nfft as i64,
        spec.window.as_str(),
        r.enbw_bins,
        spec.averaging.as_str(),
        r.averages,
        r.first_sample as i64,
        r.oldest_first_sample as i64,
        spec.integration_low_cut_hz,
        r.speed_hz,
        r.power.len() as i64,
        power,
        envelope,
        bands,
        bytes as i64,
    ])?;
    Ok(conn.last_insert_rowid())
}

/// Writes a hole: records lost for `channel` (None: every channel) from
/// `from_s` to `to_s`.
///
/// # Errors
/// SQLite's error.
pub fn insert_hole(
    conn: &Connection,
    channel: Option<&str>,
    from_s: u64,
    to_s: u64,
    reason: &str,
    lost: u64,
) -> rusqlite::Result<()> {
    conn.prepare_cached(
        "INSERT INTO holes (channel, t_from, t_to, reason, lost) VALUES (?1, ?2, ?3, ?4, ?5)",
    )?
    .execute(params![
        channel,
        from_s as i64,
        to_s.max(from_s) as i64,
        reason,
        lost as i64
    ])?;
    Ok(())
}

/// What one retention pass did.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct Retained {
    pub points_deleted: u64,
    /// Rows merged into hourly rows (before merging).
    pub points_thinned: u64,
    pub spectra_deleted: u64,
    /// Pages in use × page size after the pass.
    pub used_bytes: u64,
    /// Whether the file is still over `max_bytes` with nothing left to
    /// delete but references, event spectra and aggregates.
    pub over_bound: bool,
}

/// Bytes of the pages in use (the file's size less its free pages).
///
/// # Errors
/// SQLite's error.
pub fn used_bytes(conn: &Connection) -> rusqlite::Result<u64> {
    let pages: i64 = conn.pragma_query_value(None, "page_count", |r| r.get(0))?;
    let free: i64 = conn.pragma_query_value(None, "freelist_count", |r| r.get(0))?;
    let size: i64 = conn.pragma_query_value(None, "page_size", |r| r.get(0))?;
    Ok(((pages - free).max(0) * size) as u64)
}

/// Spectra retention may delete: neither a reference nor an alarm's.
const DELETABLE: &str = "reference = 0 AND reason <> 'alarm'";

/// One retention pass at `now_s` (see the module comment). Each step
/// seeks by series and time (the points' key), never scans the table; the
/// thinning starts where the last pass ended (`meta.thinned_through`).
///
/// # Errors
/// SQLite's error.
pub fn retain(conn: &mut Connection, spec: &HistorySpec, now_s: u64) -> rusqlite::Result<Retained> {
    let mut out = Retained::default();
    let day = 86_400u64;
    let hour = i64::from(THIN_SPAN_S);
    let keep_from = now_s.saturating_sub(u64::from(spec.keep_days) * day) as i64;
    let tx = conn.transaction()?;
    let ids: Vec<i64> = tx
        .prepare("SELECT id FROM series")?
        .query_map([], |r| r.get(0))?
        .collect::<Result<_, _>>()?;
    {
        let mut del = tx.prepare_cached("DELETE FROM points WHERE series = ?1 AND t < ?2")?;
        for id in &ids {
            out.points_deleted += del.execute(params![id, keep_from])? as u64;
        }
    }
    tx.execute("DELETE FROM holes WHERE t_to < ?1", [keep_from])?;
    if spec.thin_after_days > 0 {
        // Whole hours only: an hour is thinned once it is entirely older
        // than the bound.
        let bound = now_s.saturating_sub(u64::from(spec.thin_after_days) * day) as i64;
        let bound = bound - bound % hour;
        let from: i64 = tx
            .query_row(
                "SELECT value FROM meta WHERE key = 'thinned_through'",
                [],
                |r| r.get(0),
            )
            .optional()?
            .unwrap_or(0)
            .max(keep_from - keep_from % hour);
        if bound > from {
            tx.execute_batch(
                "CREATE TEMP TABLE IF NOT EXISTS thin (series INTEGER, t INTEGER, n INTEGER,
                   n_bad INTEGER, min REAL, mean REAL, max REAL, last REAL, state INTEGER);",
            )?;
            let mut clear = tx.prepare_cached("DELETE FROM temp.thin")?;
            // `last`: the last value of the hour's newest row that has one.
            let mut gather = tx.prepare_cached(
                "INSERT INTO temp.thin
                 SELECT series, t - t % ?4, sum(n), sum(n_bad), min(min),
                        CASE WHEN sum(n) > 0 THEN sum(mean * n) / sum(n) END,
                        max(max),
                        (SELECT p2.last FROM points p2
                          WHERE p2.series = ?1 AND p2.t >= p.t - p.t % ?4
                            AND p2.t < p.t - p.t % ?4 + ?4 AND p2.last IS NOT NULL
                          ORDER BY p2.t DESC LIMIT 1),
                        max(state)
                 FROM points p WHERE series = ?1 AND t >= ?2 AND t < ?3 AND span < ?4
                 GROUP BY t - t % ?4",
            )?;
            let mut drop_rows = tx.prepare_cached(
                "DELETE FROM points WHERE series = ?1 AND t >= ?2 AND t < ?3 AND span < ?4",
            )?;
            let mut put = tx.prepare_cached(
                "INSERT OR REPLACE INTO points (series, t, span, n, n_bad, min, mean, max, last, state)
                 SELECT series, t, ?1, n, n_bad, min, mean, max, last, state FROM temp.thin",
            )?;
            for id in &ids {
                clear.execute([])?;
                gather.execute(params![id, from, bound, hour])?;
                out.points_thinned += drop_rows.execute(params![id, from, bound, hour])? as u64;
                put.execute([hour])?;
            }
            tx.execute(
                "INSERT OR REPLACE INTO meta (key, value) VALUES ('thinned_through', ?1)",
                [bound],
            )?;
        }
    }
    let spectra_from = now_s.saturating_sub(u64::from(spec.spectra_keep_days) * day) as i64;
    out.spectra_deleted += tx.execute(
        &format!("DELETE FROM spectra WHERE t_ns < ?1 AND {DELETABLE}"),
        [spectra_from.saturating_mul(1_000_000_000)],
    )? as u64;
    tx.commit()?;
    // The byte bound: the oldest deletable spectra, a batch at a time.
    loop {
        out.used_bytes = used_bytes(conn)?;
        if out.used_bytes <= spec.max_bytes {
            break;
        }
        let n = conn.execute(
            &format!(
                "DELETE FROM spectra WHERE id IN (SELECT id FROM spectra WHERE {DELETABLE}
                 ORDER BY t_ns LIMIT 64)"
            ),
            [],
        )? as u64;
        if n == 0 {
            out.over_bound = true;
            break;
        }
        out.spectra_deleted += n;
    }
    // Each step of the pragma frees one page: run it to the end.
    {
        let mut vacuum = conn.prepare("PRAGMA incremental_vacuum")?;
        let mut rows = vacuum.query([])?;
        while rows.next()?.is_some() {}
    }
    out.used_bytes = used_bytes(conn)?;
    Ok(out)
}

/// Marks spectrum `id` as its channel's reference (the channel's previous
/// reference is unmarked). Returns the channel, or None for no such id.
///
/// # Errors
/// SQLite's error.
pub fn mark_reference(conn: &mut Connection, id: i64) -> rusqlite::Result<Option<String>> {
    let tx = conn.transaction()?;
    let channel: Option<String> = tx
        .query_row("SELECT channel FROM spectra WHERE id = ?1", [id], |r| {
            r.get(0)
        })
        .optional()?;
    let Some(channel) = channel else {
        return Ok(None);
    };
    tx.execute(
        "UPDATE spectra SET reference = 0 WHERE channel = ?1 AND reference <> 0",
        [&channel],
    )?;
    tx.execute("UPDATE spectra SET reference = 1 WHERE id = ?1", [id])?;
    tx.commit()?;
    Ok(Some(channel))
}
