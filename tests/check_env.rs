//! `bandwatch check` looks at the machine too, and `run` refuses a token
//! file others can read: real temporary directories, real file modes, a
//! port held by a real listener on 127.0.0.1, the real binary. (The tests
//! run as root on CI, where a mode does not stop a read or a write, so the
//! unwritable storage directory is one below a regular file.)

mod common;

use std::os::unix::fs::PermissionsExt as _;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use bandwatch::config::fixture::quoted;

fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("bw-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

fn bandwatch(args: &[&str], cwd: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_bandwatch"))
        .args(args)
        .current_dir(cwd)
        .env_remove("STATE_DIRECTORY")
        .output()
        .expect("run bandwatch")
}

fn token(dir: &Path, mode: u32) -> PathBuf {
    let p = dir.join("token");
    std::fs::write(&p, "0123456789abcdef0123456789abcdef\n").expect("token");
    std::fs::set_permissions(&p, std::fs::Permissions::from_mode(mode)).expect("chmod");
    p
}

/// A sim config with `[alarms]` as given and extra sources.
fn config(dir: &Path, listen: &str, alarms: &str, sources: &str) -> PathBuf {
    let text = format!(
        "[server]\nlisten = {}\n\n[alarms]\n{alarms}\n\n[[source]]\nname = \"sim\"\nkind = \"sim\"\n{sources}\n\
         [[channel]]\nname = \"a\"\nsource = \"sim\"\nindex = 0\nunit = \"g\"\nblock = 4096\n",
        quoted(listen)
    );
    let p = dir.join("bandwatch.toml");
    std::fs::write(&p, text).expect("config");
    p
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

#[test]
fn a_good_environment_passes_and_nothing_is_left_behind() {
    let dir = temp_dir("env-good");
    token(&dir, 0o600);
    // Relative paths: against the config file's directory, not the
    // working directory (the test runs the binary from /).
    let cfg = config(
        &dir,
        "127.0.0.1:0",
        "storage_dir = \"data/deeper\"\ntoken_file = \"token\"\n\n[history]",
        "",
    );
    let out = bandwatch(
        &["check", "--config", cfg.to_str().expect("utf8")],
        Path::new("/"),
    );
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(stdout.contains("environment ok"), "{stdout}");
    assert!(
        !dir.join("data").exists(),
        "check left its storage directory behind"
    );
    let left: Vec<_> = std::fs::read_dir(&dir)
        .expect("dir")
        .map(|e| e.expect("entry").file_name())
        .collect();
    assert_eq!(left.len(), 2, "only the config and the token: {left:?}");
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn every_problem_is_named_by_its_field() {
    let dir = temp_dir("env-bad");
    token(&dir, 0o644);
    std::fs::write(dir.join("plain-file"), b"x").expect("file");
    // Ports held by real sockets for the whole check.
    let held_tcp = std::net::TcpListener::bind("127.0.0.1:0").expect("tcp");
    let held_src = std::net::TcpListener::bind("127.0.0.1:0").expect("tcp");
    let held_udp = std::net::UdpSocket::bind("127.0.0.1:0").expect("udp");
    let server = held_tcp.local_addr().expect("addr").to_string();
    let sources = format!(
        "[[source]]\nname = \"box\"\nkind = \"tcp-listen\"\nlisten = {}\nchannels = 1\nsample_rate_hz = 1000\n\
         [[source]]\nname = \"udp\"\nkind = \"udp\"\nlisten = {}\nchannels = 1\nsample_rate_hz = 1000\n\
         [[source]]\nname = \"ser\"\nkind = \"serial\"\ndevice = {}\nbaud = 115200\nchannels = 1\nsample_rate_hz = 1000\n",
        quoted(&held_src.local_addr().expect("addr").to_string()),
        quoted(&held_udp.local_addr().expect("addr").to_string()),
        quoted(&dir.join("no-such-tty").display().to_string()),
    );
    let cfg = config(
        &dir,
        &server,
        "storage_dir = \"plain-file/data\"\ntoken_file = \"token\"\n\n\
         [history]\nfile = \"plain-file/hist/history.sqlite\"",
        &sources,
    );
    let path = cfg.to_str().expect("utf8");
    let out = bandwatch(&["check", "--config", path], &dir);
    let err = stderr(&out);
    assert_eq!(out.status.code(), Some(1), "{err}");
    for (field, what) in [
        ("alarms.storage_dir:", "not a directory"),
        ("alarms.token_file:", "mode 0644"),
        ("history.file:", "not a directory"),
        ("server.listen:", "cannot listen"),
        ("source[1] \"box\".listen:", "cannot listen"),
        ("source[2] \"udp\".listen:", "cannot bind"),
        ("source[3] \"ser\".device:", "no-such-tty"),
    ] {
        assert!(
            err.lines().any(|l| l.contains(field) && l.contains(what)),
            "no `{field} … {what}` in:\n{err}"
        );
    }
    // The file alone is fine.
    let out = bandwatch(&["check", "--no-env", "--config", path], &dir);
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    drop((held_tcp, held_src, held_udp));
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn a_missing_or_unreadable_token_file_is_named() {
    let dir = temp_dir("env-token");
    std::fs::create_dir(dir.join("token-dir")).expect("dir");
    for (file, what) in [("missing", "cannot open"), ("token-dir", "cannot read")] {
        let cfg = config(
            &dir,
            "127.0.0.1:0",
            &format!("storage_dir = \"data\"\ntoken_file = {}", quoted(file)),
            "",
        );
        let out = bandwatch(&["check", "--config", cfg.to_str().expect("utf8")], &dir);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(1), "{err}");
        assert!(
            err.lines()
                .any(|l| l.contains("alarms.token_file:") && l.contains(what)),
            "{file}: {err}"
        );
    }
    let _ = std::fs::remove_dir_all(&dir);
}

/// Starts `run`, waits for its listening line and then (at most 10 s) for
/// `expect` to exist, then kills it; the stderr lines read up to then.
fn run_until_listening(
    args: &[&str],
    cwd: &Path,
    env: &[(&str, &str)],
    expect: &Path,
) -> Vec<String> {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_bandwatch"));
    cmd.args(args)
        .current_dir(cwd)
        .env_remove("STATE_DIRECTORY")
        .env_remove("NOTIFY_SOCKET")
        .stdout(Stdio::null());
    for (k, v) in env {
        cmd.env(k, v);
    }
    let (mut child, rx) = common::spawn_with_stderr_lines(&mut cmd);
    let deadline = Instant::now() + Duration::from_secs(20);
    let mut lines = Vec::new();
    loop {
        let left = deadline.saturating_duration_since(Instant::now());
        match rx.recv_timeout(left) {
            Ok(l) => {
                let done = l.contains("listening on");
                lines.push(l);
                if done {
                    break;
                }
            }
            Err(_) => break,
        }
    }
    let deadline = Instant::now() + Duration::from_secs(10);
    while !expect.exists() && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(20));
    }
    let _ = child.kill();
    let _ = child.wait();
    lines
}

#[test]
fn run_refuses_a_token_others_can_read_unless_told() {
    let dir = temp_dir("run-token");
    token(&dir, 0o640);
    let cfg = config(
        &dir,
        "127.0.0.1:0",
        "storage_dir = \"data\"\ntoken_file = \"token\"",
        "",
    );
    let path = cfg.to_str().expect("utf8");
    let out = bandwatch(&["run", "--config", path], Path::new("/"));
    let err = stderr(&out);
    assert_eq!(out.status.code(), Some(1), "{err}");
    let tok = dir.join("token").display().to_string();
    assert!(
        err.contains("alarms.token_file") && err.contains(&tok) && err.contains("0640"),
        "{err}"
    );
    assert!(
        !dir.join("data").exists(),
        "refused before anything was written"
    );

    // Told: it starts, and the relative storage_dir is the config's dir's.
    config(
        &dir,
        "127.0.0.1:0",
        "storage_dir = \"data\"\ntoken_file = \"token\"\ntoken_file_insecure_ok = true",
        "",
    );
    let journal = dir.join("data/journal");
    let lines = run_until_listening(&["run", "--config", path], Path::new("/"), &[], &journal);
    assert!(
        lines.iter().any(|l| l.contains("listening on")),
        "{lines:#?}"
    );
    assert!(
        dir.join("data/journal").is_dir(),
        "storage beside the config"
    );
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn state_dir_flag_and_state_directory_hold_a_relative_storage_dir() {
    let dir = temp_dir("state-dir");
    let cfg = config(&dir, "127.0.0.1:0", "storage_dir = \"data\"", "");
    let path = cfg.to_str().expect("utf8");
    let flag = dir.join("flag");
    let lines = run_until_listening(
        &[
            "run",
            "--config",
            path,
            "--state-dir",
            flag.to_str().expect("utf8"),
        ],
        Path::new("/"),
        &[],
        &flag.join("data/journal"),
    );
    assert!(flag.join("data/journal").is_dir(), "{lines:#?}");
    // systemd's StateDirectory= with two entries: the first one is used.
    let first = dir.join("first");
    let second = dir.join("second");
    let both = format!("{}:{}", first.display(), second.display());
    let lines = run_until_listening(
        &["run", "--config", path],
        Path::new("/"),
        &[("STATE_DIRECTORY", both.as_str())],
        &first.join("data/journal"),
    );
    assert!(first.join("data/journal").is_dir(), "{lines:#?}");
    assert!(!second.exists());
    assert!(!dir.join("data").exists(), "nothing beside the config");
    let _ = std::fs::remove_dir_all(&dir);
}

/// `check` prints the history file's steady-state size and warns (exit 0:
/// it is an estimate) when `max_mb` cannot hold it. One channel of block
/// 4096 (2049 lines), no band, the defaults: 5 series × (30 × 1440 + 335
/// × 24) rows × 72 B = 18,446,400 B of aggregates; 144 spectra a day of
/// 4 × 2049 + 512 B = 1,253,952 B a day (docs/history.md "Sizing").
#[test]
fn check_tells_whether_max_mb_holds_the_history() {
    let dir = temp_dir("env-history-size");
    let run = |max_mb: &str| {
        let cfg = config(
            &dir,
            "127.0.0.1:0",
            &format!("storage_dir = \"data\"\n\n[history]\n{max_mb}"),
            "",
        );
        let out = bandwatch(
            &["check", "--no-env", "--config", cfg.to_str().expect("utf8")],
            Path::new("/"),
        );
        assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
        (
            String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr(&out),
        )
    };
    let (out, err) = run("");
    assert!(
        out.contains("18 MB of aggregates (256200 rows, 365 days)"),
        "{out}"
    );
    assert!(!err.contains("warning"), "{err}");
    // (64 MiB − 18,446,400 B) / 1,253,952 B a day = 38.8 days.
    let (_, err) = run("max_mb = 64");
    assert!(
        err.contains("room for about 39 days of timer spectra"),
        "{err}"
    );
    let (_, err) = run("max_mb = 16");
    assert!(
        err.contains("the aggregates alone (about 18 MB) exceed max_mb = 16"),
        "{err}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}
