//! What `bandwatch check` asks of the machine, beyond the file itself: the
//! storage directory (and the history file's) can be created and written,
//! the token file is there,
//! readable and private, every serial device exists and every listen
//! address is free. Each problem is a [`ConfigIssue`] under the field path
//! that named the thing (`alarms.storage_dir`, `source[0] "daq".listen`).
//!
//! Nothing is left behind: directories the check creates and the probe
//! file it writes are removed again, sockets are bound and dropped.
//! `run` uses [`token_file_mode`] alone, to refuse a token that group or
//! others may read.

use std::fs;
use std::io::{ErrorKind, Read as _, Write as _};
use std::net::SocketAddr;
use std::os::unix::fs::PermissionsExt as _;
use std::path::{Path, PathBuf};

use super::alarms::TokenSource;
use super::issue::{ConfigIssue, Issues};
use super::spec::{Config, SourceKind};

/// Every problem of the environment `config` would run in (see the module
/// docs); empty when it would start.
pub fn check_environment(config: &Config) -> Vec<ConfigIssue> {
    let mut issues = Issues::default();
    if let Some(a) = &config.alarms {
        if let Err(m) = check_storage(&a.storage_dir) {
            issues.add("alarms.storage_dir", m);
        }
        if let Some(TokenSource::File(path)) = &a.token {
            match read_token_file(path) {
                Err(m) => issues.add("alarms.token_file", m),
                Ok(()) => {
                    if let Err(i) = token_file_mode(config) {
                        issues.extend(vec![i]);
                    }
                }
            }
        }
    }
    if let Some(h) = &config.history {
        // The file's directory, created and written as the writer would;
        // an existing file must be a file the daemon can open for writing.
        let dir = h.file.parent().unwrap_or(Path::new("."));
        if let Err(m) = check_storage(dir) {
            issues.add("history.file", m);
        } else if let Ok(meta) = fs::metadata(&h.file) {
            if !meta.is_file() {
                issues.add(
                    "history.file",
                    format!("{} exists and is not a file", h.file.display()),
                );
            } else if let Err(e) = fs::OpenOptions::new().append(true).open(&h.file) {
                issues.add(
                    "history.file",
                    format!("{} cannot be opened for writing: {e}", h.file.display()),
                );
            }
        }
    }
    if let Err(m) = tcp_free(config.listen) {
        issues.add("server.listen", m);
    }
    for (i, s) in config.sources.iter().enumerate() {
        let path = format!("source[{i}] {:?}", s.name);
        match &s.kind {
            SourceKind::TcpListen { listen, .. } => {
                if let Err(m) = tcp_free(*listen) {
                    issues.add(format!("{path}.listen"), m);
                }
            }
            SourceKind::Udp { listen, .. } => {
                if let Err(m) = udp_free(*listen) {
                    issues.add(format!("{path}.listen"), m);
                }
            }
            SourceKind::Serial { device, .. } => {
                if let Err(e) = fs::metadata(device) {
                    issues.add(
                        format!("{path}.device"),
                        format!("serial device {device} is not there: {e}"),
                    );
                }
            }
            SourceKind::Sim { .. } | SourceKind::TcpConnect { .. } => {}
        }
    }
    issues.into_vec()
}

/// `Err` when `[alarms] token_file` names a file that group or others may
/// read (mode & 0o077 != 0) and `token_file_insecure_ok` is off. A file
/// that cannot be inspected is left to the token loader, which names it.
///
/// # Errors
/// The issue, under `alarms.token_file`, naming the file and its mode.
pub fn token_file_mode(config: &Config) -> Result<(), ConfigIssue> {
    let Some(a) = &config.alarms else {
        return Ok(());
    };
    let Some(TokenSource::File(path)) = &a.token else {
        return Ok(());
    };
    if a.token_file_insecure_ok {
        return Ok(());
    }
    let Ok(meta) = fs::metadata(path) else {
        return Ok(());
    };
    let mode = meta.permissions().mode() & 0o7777;
    if mode & 0o077 == 0 {
        return Ok(());
    }
    Err(ConfigIssue {
        path: "alarms.token_file".into(),
        message: format!(
            "{} has mode {mode:04o}: group or others can read the token; `chmod 600` it \
             (or set [alarms] token_file_insecure_ok = true to accept it)",
            path.display()
        ),
    })
}

/// The token file exists, is a file, and can be read.
fn read_token_file(path: &Path) -> Result<(), String> {
    let mut f = fs::File::open(path).map_err(|e| format!("cannot open {}: {e}", path.display()))?;
    let mut text = String::new();
    f.read_to_string(&mut text)
        .map_err(|e| format!("cannot read {}: {e}", path.display()))?;
    if text.lines().next().is_none_or(|l| l.trim().is_empty()) {
        return Err(format!("{} has no token on its first line", path.display()));
    }
    Ok(())
}

/// `dir` exists as a directory or can be created, and a file can be
/// written in it (and in its `journal`, `captures`, `baselines` where
/// those exist). What this creates, it removes.
pub fn check_storage(dir: &Path) -> Result<(), String> {
    // The missing part of the path, deepest first.
    let mut missing: Vec<PathBuf> = Vec::new();
    let mut p = dir;
    loop {
        match fs::metadata(p) {
            Ok(m) if m.is_dir() => break,
            Ok(_) => return Err(format!("{} is not a directory", p.display())),
            Err(e) if matches!(e.kind(), ErrorKind::NotFound | ErrorKind::NotADirectory) => {
                missing.push(p.to_path_buf());
                match p.parent() {
                    Some(q) if !q.as_os_str().is_empty() => p = q,
                    _ => break,
                }
            }
            Err(e) => return Err(format!("cannot inspect {}: {e}", p.display())),
        }
    }
    let result = fs::create_dir_all(dir)
        .map_err(|e| format!("cannot create {}: {e}", dir.display()))
        .and_then(|()| probe(dir))
        .and_then(|()| {
            ["journal", "captures", "baselines"]
                .iter()
                .map(|s| dir.join(s))
                .filter(|d| d.is_dir())
                .try_for_each(|d| probe(&d))
        });
    for m in &missing {
        let _ = fs::remove_dir(m);
    }
    result
}

/// Writes and removes a probe file in `dir`.
fn probe(dir: &Path) -> Result<(), String> {
    let name = dir.join(format!(".bandwatch-check-{}", std::process::id()));
    let written = fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&name)
        .and_then(|mut f| f.write_all(b"check\n"));
    let _ = fs::remove_file(&name);
    written.map_err(|e| format!("cannot write in {}: {e}", dir.display()))
}

/// A TCP listener can bind `addr` (port 0 is always free).
fn tcp_free(addr: SocketAddr) -> Result<(), String> {
    if addr.port() == 0 {
        return Ok(());
    }
    std::net::TcpListener::bind(addr)
        .map(drop)
        .map_err(|e| format!("cannot listen on {addr}: {e}"))
}

/// A UDP socket can bind `addr` (port 0 is always free).
fn udp_free(addr: SocketAddr) -> Result<(), String> {
    if addr.port() == 0 {
        return Ok(());
    }
    std::net::UdpSocket::bind(addr)
        .map(drop)
        .map_err(|e| format!("cannot bind {addr}: {e}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn storage_check_leaves_nothing_behind() {
        let base = std::env::temp_dir().join(format!("bw-env-unit-{}", std::process::id()));
        let _ = fs::remove_dir_all(&base);
        fs::create_dir_all(&base).expect("tmp");
        let deep = base.join("a/b/c");
        assert_eq!(check_storage(&deep), Ok(()));
        assert!(!base.join("a").exists(), "created directories removed");
        assert_eq!(fs::read_dir(&base).expect("dir").count(), 0);
        // Below a regular file nothing can be created.
        fs::write(base.join("f"), b"x").expect("file");
        let bad = check_storage(&base.join("f/sub"));
        assert!(
            bad.as_ref().is_err_and(|m| m.contains("not a directory")),
            "{bad:?}"
        );
        let _ = fs::remove_dir_all(&base);
    }
}
