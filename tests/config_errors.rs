//! Bad configs: each is rejected, and the message names the field path.

use bandwatch::config::{parse_str, ParseError};

const BASE: &str = r#"
[server]
listen = "127.0.0.1:9750"

[[source]]
name = "sim"
kind = "sim"

[[channel]]
name = "pump-de"
source = "sim"
index = 1
unit = "g"
block = 8192
overlap = 0.5

  [[channel.band]]
  name = "bpfo"
  lo_hz = 80
  hi_hz = 100
"#;

/// Applies `from -> to` to the base config and returns every issue message.
fn issues(from: &str, to: &str) -> Vec<String> {
    assert!(BASE.contains(from), "test setup: {from:?} not in base");
    let text = BASE.replacen(from, to, 1);
    match parse_str(&text) {
        Ok(_) => panic!("config with {to:?} was accepted"),
        Err(ParseError::Toml(m)) => vec![m],
        Err(ParseError::Invalid(v)) => v.iter().map(|i| i.to_string()).collect(),
    }
}

fn assert_issue(from: &str, to: &str, path: &str, words: &str) {
    let got = issues(from, to);
    assert!(
        got.iter().any(|m| m.contains(path) && m.contains(words)),
        "expected an issue at {path:?} saying {words:?}, got {got:#?}"
    );
}

#[test]
fn base_config_is_valid() {
    parse_str(BASE).expect("the base config must be valid");
}

#[test]
fn band_above_nyquist() {
    assert_issue(
        "hi_hz = 100",
        "hi_hz = 14000",
        "channel \"pump-de\" band \"bpfo\".hi_hz",
        "above Nyquist 12800 Hz",
    );
}

#[test]
fn band_lo_not_below_hi() {
    assert_issue(
        "lo_hz = 80",
        "lo_hz = 120",
        "channel \"pump-de\" band \"bpfo\".lo_hz",
        "lo must be < hi",
    );
}

#[test]
fn overlap_out_of_range() {
    assert_issue(
        "overlap = 0.5",
        "overlap = 0.99",
        "channel \"pump-de\".overlap",
        "0 to 0.95",
    );
    assert_issue(
        "overlap = 0.5",
        "overlap = -0.1",
        "channel \"pump-de\".overlap",
        "0 to 0.95",
    );
}

#[test]
fn nfft_shorter_than_block() {
    assert_issue(
        "block = 8192",
        "block = 8192\nnfft = 4096",
        "channel \"pump-de\".nfft",
        "nfft must be >= block",
    );
}

#[test]
fn duplicate_channel_name() {
    let dup = format!(
        "{BASE}\n[[channel]]\nname = \"pump-de\"\nsource = \"sim\"\nindex = 2\nunit = \"g\"\n"
    );
    match parse_str(&dup) {
        Err(ParseError::Invalid(v)) => assert!(
            v.iter()
                .any(|i| i.path == "channel \"pump-de\".name" && i.message.contains("duplicate")),
            "{v:#?}"
        ),
        other => panic!("duplicate channel accepted: {other:?}"),
    }
}

#[test]
fn duplicate_band_name() {
    let text = format!("{BASE}\n  [[channel.band]]\n  name = \"bpfo\"\n  lo_hz = 1\n  hi_hz = 2\n");
    match parse_str(&text) {
        Err(ParseError::Invalid(v)) => assert!(
            v.iter()
                .any(|i| i.path.contains("band \"bpfo\".name") && i.message.contains("duplicate")),
            "{v:#?}"
        ),
        other => panic!("duplicate band accepted: {other:?}"),
    }
}

#[test]
fn unknown_source() {
    assert_issue(
        "source = \"sim\"",
        "source = \"daq-7\"",
        "channel \"pump-de\".source",
        "unknown source \"daq-7\"",
    );
}

#[test]
fn index_past_the_source() {
    assert_issue(
        "index = 1",
        "index = 9",
        "channel \"pump-de\".index",
        "past the last channel",
    );
}

#[test]
fn unknown_unit_and_incompatible_band_unit() {
    assert_issue(
        "unit = \"g\"",
        "unit = \"furlong\"",
        "channel \"pump-de\".unit",
        "unknown unit",
    );
    assert_issue(
        "hi_hz = 100",
        "hi_hz = 100\n  unit = \"V\"",
        "band \"bpfo\".unit",
        "cannot be derived",
    );
}

#[test]
fn bad_listen_address() {
    assert_issue(
        "listen = \"127.0.0.1:9750\"",
        "listen = \"localhost\"",
        "server.listen",
        "port",
    );
}

#[test]
fn unknown_key_names_the_key() {
    let got = issues("unit = \"g\"", "unit = \"g\"\nwindw = \"hann\"");
    assert!(got.iter().any(|m| m.contains("windw")), "{got:#?}");
}

#[test]
fn unknown_window_is_rejected() {
    let got = issues("overlap = 0.5", "overlap = 0.5\nwindow = \"triangle\"");
    assert!(got.iter().any(|m| m.contains("triangle")), "{got:#?}");
}

#[test]
fn band_narrower_than_a_line() {
    // 25600 / 8192 = 3.125 Hz between lines: 80.0–81.0 Hz holds none (lines at 78.125 and 81.25).
    assert_issue(
        "lo_hz = 80\n  hi_hz = 100",
        "lo_hz = 80.0\n  hi_hz = 81.0",
        "band \"bpfo\"",
        "holds no spectral line",
    );
}

#[test]
fn conflicting_scaling() {
    assert_issue(
        "unit = \"g\"",
        "unit = \"g\"\nscale = 1e-6\nvolts_per_count = 1e-6\nsensitivity_v_per_unit = 0.1",
        "channel \"pump-de\".scale",
        "not both",
    );
}

#[test]
fn averaging_count_zero() {
    assert_issue(
        "overlap = 0.5",
        "overlap = 0.5\naveraging = { mode = \"linear\", count = 0 }",
        "channel \"pump-de\".averaging.count",
        "out of range",
    );
}

#[test]
fn every_problem_is_reported_at_once() {
    let text = BASE
        .replacen("overlap = 0.5", "overlap = 2.0", 1)
        .replacen("hi_hz = 100", "hi_hz = 20000", 1)
        .replacen("source = \"sim\"\nindex", "source = \"nope\"\nindex", 1);
    match parse_str(&text) {
        Err(ParseError::Invalid(v)) => assert!(v.len() >= 2, "{v:#?}"),
        other => panic!("accepted: {other:?}"),
    }
}

#[test]
fn trend_seconds_out_of_range() {
    let listen = "listen = \"127.0.0.1:9750\"";
    for bad in ["trend_seconds = 5", "trend_seconds = 86401"] {
        assert_issue(
            listen,
            &format!("{listen}\n{bad}"),
            "server.trend_seconds",
            "out of range 10 to 86400",
        );
    }
    let ok = BASE.replacen(listen, &format!("{listen}\ntrend_seconds = 3600"), 1);
    let cfg = parse_str(&ok).expect("trend_seconds = 3600 is valid");
    assert_eq!(cfg.trend_seconds, 3600);
    assert_eq!(parse_str(BASE).expect("base").trend_seconds, 600);
}
