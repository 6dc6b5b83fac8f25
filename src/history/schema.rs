//! The history database's schema and how it is opened (docs/history.md
//! describes every table and column for people who open the file with the
//! `sqlite3` shell).
//!
//! One SQLite file (`[history] file`, default `history.sqlite` in
//! `[alarms] storage_dir`), in WAL mode so readers (the HTTP queries, a
//! `sqlite3` shell) never block the one writer thread and the writer never
//! blocks them; `synchronous = NORMAL`, which in WAL mode keeps every
//! committed transaction across a killed process (the commit is in the
//! WAL file before it returns) and loses at most the last ones on a power
//! cut, never the file's integrity (SQLite's documentation, "Write-Ahead
//! Logging"). `auto_vacuum = INCREMENTAL` is set before the first table
//! exists, so retention can hand freed pages back to the file system.
//! The schema's version is `PRAGMA user_version`.

use std::path::Path;
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};

/// The schema this build writes and reads.
pub const SCHEMA_VERSION: i64 = 1;

/// How long a connection waits for a lock another one holds (the writer
/// while a query reads a checkpointing WAL, an operator's write while the
/// writer commits) before it reports SQLITE_BUSY.
pub const BUSY_TIMEOUT: Duration = Duration::from_secs(5);

/// What the WAL file is truncated to after a checkpoint, bytes.
pub const WAL_LIMIT_BYTES: i64 = 16 << 20;

/// The tables (docs/history.md has the meaning of every column).
const TABLES: &str = "
CREATE TABLE IF NOT EXISTS meta (
    key   TEXT PRIMARY KEY,
    value INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS series (
    id      INTEGER PRIMARY KEY,
    channel TEXT NOT NULL,
    name    TEXT NOT NULL,
    kind    TEXT NOT NULL CHECK (kind IN ('band', 'overall')),
    unit    TEXT NOT NULL,
    UNIQUE (channel, name)
);
CREATE TABLE IF NOT EXISTS points (
    series INTEGER NOT NULL REFERENCES series (id),
    t      INTEGER NOT NULL,
    span   INTEGER NOT NULL,
    n      INTEGER NOT NULL,
    n_bad  INTEGER NOT NULL,
    min    REAL,
    mean   REAL,
    max    REAL,
    last   REAL,
    state  INTEGER,
    PRIMARY KEY (series, t)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS holes (
    id      INTEGER PRIMARY KEY,
    channel TEXT,
    t_from  INTEGER NOT NULL,
    t_to    INTEGER NOT NULL,
    reason  TEXT NOT NULL,
    lost    INTEGER NOT NULL
);
CREATE INDEX IF NOT EXISTS holes_t ON holes (t_to);
CREATE TABLE IF NOT EXISTS spectra (
    id              INTEGER PRIMARY KEY,
    channel         TEXT NOT NULL,
    t_ns            INTEGER NOT NULL,
    published_ns    INTEGER NOT NULL,
    reason          TEXT NOT NULL CHECK (reason IN ('interval', 'alarm', 'request')),
    event           TEXT,
    reference       INTEGER NOT NULL DEFAULT 0,
    unit            TEXT NOT NULL,
    sample_rate_hz  REAL NOT NULL,
    block           INTEGER NOT NULL,
    nfft            INTEGER NOT NULL,
    window          TEXT NOT NULL,
    enbw_bins       REAL NOT NULL,
    averaging       TEXT NOT NULL,
    averages        INTEGER NOT NULL,
    first_sample    INTEGER NOT NULL,
    oldest_first_sample INTEGER NOT NULL,
    integration_low_cut_hz REAL NOT NULL,
    speed_hz        REAL,
    lines           INTEGER NOT NULL,
    power           BLOB NOT NULL,
    envelope        BLOB,
    bands           TEXT NOT NULL,
    bytes           INTEGER NOT NULL
);
CREATE INDEX IF NOT EXISTS spectra_channel_t ON spectra (channel, t_ns);
CREATE INDEX IF NOT EXISTS spectra_t ON spectra (t_ns);
";

/// Why the history file could not be opened or used.
#[derive(Debug, thiserror::Error)]
pub enum OpenError {
    #[error("{path}: {source}")]
    Sqlite {
        path: String,
        #[source]
        source: rusqlite::Error,
    },
    #[error("{path}: schema version {found}, this build knows {SCHEMA_VERSION} (a newer bandwatch wrote it)")]
    Version { path: String, found: i64 },
}

fn at(path: &Path) -> impl Fn(rusqlite::Error) -> OpenError + '_ {
    move |source| OpenError::Sqlite {
        path: path.display().to_string(),
        source,
    }
}

/// Opens (creating it if missing) the file for the writer thread or an
/// operator's write: WAL, NORMAL sync, incremental vacuum, the tables.
///
/// # Errors
/// The file cannot be opened or created, is not a database, or was
/// written by a newer schema.
pub fn open_write(path: &Path) -> Result<Connection, OpenError> {
    let e = at(path);
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_WRITE
            | OpenFlags::SQLITE_OPEN_CREATE
            | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(&e)?;
    conn.busy_timeout(BUSY_TIMEOUT).map_err(&e)?;
    let version: i64 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(&e)?;
    if version > SCHEMA_VERSION {
        return Err(OpenError::Version {
            path: path.display().to_string(),
            found: version,
        });
    }
    if version == 0 {
        // Only takes effect before the first table is made.
        conn.pragma_update(None, "auto_vacuum", "INCREMENTAL")
            .map_err(&e)?;
    }
    conn.pragma_update(None, "journal_mode", "WAL")
        .map_err(&e)?;
    conn.pragma_update(None, "synchronous", "NORMAL")
        .map_err(&e)?;
    conn.pragma_update(None, "foreign_keys", "ON").map_err(&e)?;
    // The WAL is truncated back to this after a checkpoint, so the file
    // and its WAL stay within max_mb plus this.
    conn.pragma_update(None, "journal_size_limit", WAL_LIMIT_BYTES)
        .map_err(&e)?;
    conn.execute_batch(TABLES).map_err(&e)?;
    if version == 0 {
        conn.pragma_update(None, "user_version", SCHEMA_VERSION)
            .map_err(&e)?;
    }
    Ok(conn)
}

/// Opens the file for queries only (the HTTP side): it must exist.
///
/// # Errors
/// The file is missing, not a database, or of a newer schema.
pub fn open_read(path: &Path) -> Result<Connection, OpenError> {
    let e = at(path);
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(&e)?;
    conn.busy_timeout(BUSY_TIMEOUT).map_err(&e)?;
    let version: i64 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(&e)?;
    if version > SCHEMA_VERSION {
        return Err(OpenError::Version {
            path: path.display().to_string(),
            found: version,
        });
    }
    Ok(conn)
}

/// The series names of the overall levels in the `series` table (the
/// same names the overall alarms use; reserved for band names when
/// `[history]` is on).
pub use crate::config::history::OVERALL_SERIES;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn creates_reopens_and_refuses_a_newer_schema() {
        let dir = std::env::temp_dir().join(format!("bw-schema-{}", std::process::id()));
        let _ = std::fs::create_dir_all(&dir);
        let path = dir.join("h.sqlite");
        let _ = std::fs::remove_file(&path);
        {
            let c = open_write(&path).expect("creates");
            let mode: String = c
                .pragma_query_value(None, "journal_mode", |r| r.get(0))
                .expect("mode");
            assert_eq!(mode, "wal");
            let av: i64 = c
                .pragma_query_value(None, "auto_vacuum", |r| r.get(0))
                .expect("auto_vacuum");
            assert_eq!(av, 2, "incremental");
        }
        let c = open_write(&path).expect("reopens");
        let r = open_read(&path).expect("reads");
        let v: i64 = r
            .pragma_query_value(None, "user_version", |r| r.get(0))
            .expect("version");
        assert_eq!(v, SCHEMA_VERSION);
        c.pragma_update(None, "user_version", SCHEMA_VERSION + 1)
            .expect("set");
        drop(c);
        drop(r);
        let err = open_write(&path).expect_err("newer");
        assert!(err.to_string().contains("schema version 2"), "{err}");
        assert!(open_read(&dir.join("missing.sqlite")).is_err());
        let _ = std::fs::remove_dir_all(&dir);
    }
}
