//! The operator token: loading, `Authorization: Bearer` parsing (RFC 6750
//! §2.1; scheme names are case-insensitive per RFC 7235 §2.1 [pub]) and the
//! comparison's results. Timing is not measured here (benchmarks measure
//! speed, tests do not); the compare visits every byte of the expected
//! token whatever the input, which review of `constant_time_eq` checks.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use alarm_common::TempDir;
use bandwatch::alarm::token::{
    constant_time_eq, parse_bearer, Token, TokenError, TokenSource, MIN_TOKEN_LEN,
};

const SECRET: &str = "0123456789abcdef0123456789abcdef";

#[test]
fn compare_results() {
    let s = SECRET.as_bytes();
    assert!(constant_time_eq(s, s));
    let mut first = s.to_vec();
    first[0] ^= 1;
    let mut last = s.to_vec();
    *last.last_mut().unwrap() ^= 0x80;
    assert!(!constant_time_eq(s, &first));
    assert!(!constant_time_eq(s, &last));
    assert!(!constant_time_eq(s, &s[..s.len() - 1]), "prefix");
    assert!(!constant_time_eq(s, &[s, b"x"].concat()), "extension");
    assert!(!constant_time_eq(s, b""));
    // A longer input whose first bytes match and whose extra bytes are 0.
    assert!(!constant_time_eq(s, &[s, &[0u8][..]].concat()));
    assert!(constant_time_eq(b"", b""));
}

#[test]
fn bearer_parsing() {
    assert_eq!(parse_bearer("Bearer abc.DEF-123"), Some("abc.DEF-123"));
    assert_eq!(parse_bearer("bearer abc"), Some("abc"));
    assert_eq!(parse_bearer("BEARER   abc  "), Some("abc"));
    assert_eq!(parse_bearer("Basic YWxhZGRpbjpvcGVuc2VzYW1l"), None);
    assert_eq!(parse_bearer("Bearer"), None);
    assert_eq!(parse_bearer("Bearer "), None);
    assert_eq!(parse_bearer("Bearer a b"), None);
    assert_eq!(parse_bearer("Bearerabc"), None);
    assert_eq!(parse_bearer(""), None);
}

#[test]
fn authorizes_only_the_right_token() {
    let t = Token::new(SECRET, "test").unwrap();
    assert!(t.authorizes(Some(&format!("Bearer {SECRET}"))));
    assert!(!t.authorizes(None));
    assert!(!t.authorizes(Some("Bearer 0123456789abcdef0123456789abcdee")));
    assert!(!t.authorizes(Some(&format!("Basic {SECRET}"))));
    assert!(!format!("{t:?}").contains("0123"), "Debug must not show it");
}

#[test]
fn loads_from_a_file_and_from_the_environment() {
    let dir = TempDir::new("token");
    let p = dir.path().join("token");
    std::fs::write(&p, format!("  {SECRET}\n# ignored second line\n")).unwrap();
    let t = Token::load(&TokenSource::File(p.clone())).unwrap();
    assert!(t.matches(SECRET.as_bytes()));

    let var = format!("BANDWATCH_TEST_TOKEN_{}", std::process::id());
    std::env::set_var(&var, format!("{SECRET}\n"));
    let t = Token::load(&TokenSource::Env(var.clone())).unwrap();
    assert!(t.matches(SECRET.as_bytes()));
    std::env::remove_var(&var);
    assert_eq!(
        Token::load(&TokenSource::Env(var.clone())).unwrap_err(),
        TokenError::Env(var)
    );

    std::fs::write(&p, "short\n").unwrap();
    assert!(matches!(
        Token::load(&TokenSource::File(p.clone())),
        Err(TokenError::TooShort { len: 5, .. })
    ));
    assert!(matches!(
        Token::load(&TokenSource::File(dir.path().join("missing"))),
        Err(TokenError::File { .. })
    ));
    assert!(matches!(
        Token::new(&format!("{SECRET} x"), "t"),
        Err(TokenError::BadChars { .. })
    ));
    assert_eq!(MIN_TOKEN_LEN, 16);
}
