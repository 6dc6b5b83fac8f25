//! The command line of the real binary: enumerated values listed by
//! `--help` and refused with clap's usage error, and the exit codes of the
//! README table ("Exit codes"): 0 success, 1 error or failed check, 2
//! usage. (That every option has a help text is a unit test in
//! `src/main.rs`, which walks the clap command tree.)

use std::path::PathBuf;
use std::process::{Command, Output};

fn bandwatch(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_bandwatch"))
        .args(args)
        .env_remove("STATE_DIRECTORY")
        .output()
        .expect("run bandwatch")
}

fn code(args: &[&str]) -> (Option<i32>, String) {
    let o = bandwatch(args);
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
    (o.status.code(), text)
}

fn temp_file(name: &str, text: &str) -> PathBuf {
    let p = std::env::temp_dir().join(format!("bw-cli-{}-{name}", std::process::id()));
    std::fs::write(&p, text).expect("write");
    p
}

#[test]
fn help_lists_enumerated_values() {
    for (args, values) in [
        (vec!["--help"], vec!["text", "json"]),
        (
            vec!["send", "--help"],
            vec!["bwf1", "lines", "i16", "i24", "i32", "f32", "f64", "demo"],
        ),
        (
            vec!["bench", "--help"],
            vec![
                "fft", "dsp", "path", "memory", "ingest", "http", "plant", "welch", "flat",
                "paced", "idle",
            ],
        ),
    ] {
        let (c, text) = code(&args);
        assert_eq!(c, Some(0), "{args:?}: {text}");
        for v in values {
            assert!(
                text.contains(v),
                "{args:?} --help does not list {v}:\n{text}"
            );
        }
    }
}

#[test]
fn bad_values_and_usage_exit_2() {
    for args in [
        vec!["send", "--to", "udp://127.0.0.1:9", "--framing", "xml"],
        vec!["send", "--to", "udp://127.0.0.1:9", "--format", "u8"],
        vec!["send", "--to", "udp://127.0.0.1:9", "--scenario", "other"],
        vec!["bench", "--only", "nope"],
        vec!["bench", "--http-load", "heavy"],
        vec!["--log-format", "yaml", "selftest"],
        vec!["no-such-command"],
        vec!["run"],
        vec!["check", "--config"],
    ] {
        let (c, text) = code(&args);
        assert_eq!(c, Some(2), "{args:?}: {text}");
        // clap's usage error: "error: ..." and a pointer to --help.
        assert!(
            text.starts_with("error: ") && text.contains("--help"),
            "{args:?}: not clap's usage error:\n{text}"
        );
    }
}

#[test]
fn exit_codes_of_the_readme_table() {
    let good = temp_file(
        "good.toml",
        "[server]\nlisten = \"127.0.0.1:0\"\n[[source]]\nname = \"s\"\nkind = \"sim\"\n\
         [[channel]]\nname = \"a\"\nsource = \"s\"\nindex = 0\nunit = \"g\"\nblock = 4096\n",
    );
    let bad = temp_file("bad.toml", "[server]\nlisten = \"nowhere\"\n");
    let missing = std::env::temp_dir().join("bw-cli-no-such-config.toml");
    let good = good.to_str().expect("utf8");
    let bad = bad.to_str().expect("utf8");
    let missing = missing.to_str().expect("utf8");
    let recording = temp_file("rec.bin", "not a capture");
    let recording = recording.to_str().expect("utf8");
    for (args, want) in [
        (vec!["--version"], 0),
        (vec!["check", "--config", good], 0),
        (vec!["check", "--no-env", "--config", good], 0),
        (vec!["check", "--config", bad], 1),
        (vec!["check", "--config", missing], 1),
        (vec!["run", "--config", bad], 1),
        (vec!["run", "--config", missing], 1),
        (vec!["replay", recording, "--config", bad], 1),
        // A recording without its config is a usage error.
        (vec!["replay", recording], 2),
        // Nobody listens on port 1 of loopback: the send fails.
        (
            vec!["send", "--to", "tcp://127.0.0.1:1", "--seconds", "0.1"],
            1,
        ),
        (vec!["bench", "--n", "10"], 2),
    ] {
        let (c, text) = code(&args);
        assert_eq!(c, Some(want), "{args:?}: {text}");
    }
    let (c, text) = code(&["check", "--config", bad]);
    assert!(text.contains("server.listen"), "{c:?} {text}");

    // `[metrics] exclude`: an entry that matches no family of the config
    // fails `check` and `run` with its index (README "Trimming /metrics").
    let good_text = std::fs::read_to_string(good).expect("read");
    let trim = |name: &str, entry: &str| {
        temp_file(
            name,
            &format!("{good_text}[metrics]\nexclude = [\"bandwatch_channel_crest_factor\", \"{entry}\"]\n"),
        )
    };
    let ok = trim("trim-ok.toml", "bandwatch_source_*");
    let typo = trim("trim-typo.toml", "bandwatch_chanel_*");
    let own = trim("trim-own.toml", "bandwatch_build_info");
    let (c, text) = code(&["check", "--no-env", "--config", ok.to_str().expect("utf8")]);
    assert_eq!(c, Some(0), "{text}");
    for f in [&typo, &own] {
        let f = f.to_str().expect("utf8");
        for cmd in ["check", "run"] {
            let (c, text) = code(&[cmd, "--config", f]);
            assert_eq!(c, Some(1), "{cmd} {f}: {text}");
            assert!(text.contains("metrics.exclude[1]"), "{cmd} {f}: {text}");
        }
    }
}
