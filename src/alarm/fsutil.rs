//! Small file-system helpers shared by the journal, the baselines and the
//! capture store: durable writes and safe file names.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::Path;

/// Suffix of files being written; a file with it is never complete.
pub const TEMP_SUFFIX: &str = ".tmp";

/// Flushes a directory's entry table, so that a rename or create inside it
/// survives a power cut (POSIX needs an fsync on the directory for that).
pub fn fsync_dir(dir: &Path) -> io::Result<()> {
    #[cfg(unix)]
    {
        File::open(dir)?.sync_all()
    }
    #[cfg(not(unix))]
    {
        let _ = dir;
        Ok(())
    }
}

/// Writes `bytes` under `dir/name` so that a crash leaves either the old
/// file or the new one, never a mix: write `name.tmp`, fsync it, rename it
/// over `name`, fsync the directory.
pub fn atomic_write(dir: &Path, name: &str, bytes: &[u8]) -> io::Result<()> {
    let tmp = dir.join(format!("{name}{TEMP_SUFFIX}"));
    write_synced(&tmp, bytes)?;
    fs::rename(&tmp, dir.join(name))?;
    fsync_dir(dir)
}

/// Creates (or truncates) `path`, writes `bytes` and fsyncs the file.
pub fn write_synced(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let mut f = OpenOptions::new()
        .write(true)
        .create(true)
        .truncate(true)
        .open(path)?;
    f.write_all(bytes)?;
    f.sync_all()
}

/// Turns a channel or band name into a file-name component: ASCII letters,
/// digits, `-` and `_` stay; every other byte becomes `%XX`. Distinct names
/// stay distinct, and the result can never be `.`, `..` or contain `/`.
pub fn safe_name(name: &str) -> String {
    let mut out = String::with_capacity(name.len());
    for b in name.bytes() {
        if b.is_ascii_alphanumeric() || b == b'-' || b == b'_' {
            out.push(char::from(b));
        } else {
            out.push_str(&format!("%{b:02X}"));
        }
    }
    if out.is_empty() {
        out.push('%');
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn safe_names() {
        assert_eq!(safe_name("pump-de"), "pump-de");
        assert_eq!(safe_name("../x"), "%2E%2E%2Fx");
        assert_eq!(safe_name("a b"), "a%20b");
        assert_ne!(safe_name("a%20b"), safe_name("a b"));
    }
}
