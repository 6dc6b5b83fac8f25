//! Basic auth for every endpoint, when `[server] web_config` names users
//! (README, "Serving over the network (TLS, basic auth)").
//!
//! The rule:
//! - `Authorization: Basic …` with a configured user and the password of
//!   its bcrypt hash: in.
//! - `Authorization: Bearer …` with the operator token of `[alarms]`
//!   (`token_file`/`token_env`): in — token holders are operators, and a
//!   request carries one `Authorization` header, so a write (acknowledge,
//!   re-learn) is sent with the token alone, as without basic auth.
//! - Anything else (no header, another scheme, an unknown user, a wrong
//!   password or token): 401 with `WWW-Authenticate: Basic
//!   realm="bandwatch"`, counted in `bandwatch_http_auth_failures_total`.
//!
//! Basic credentials do not open the write endpoints: those still want the
//! bearer token, as they always did.
//!
//! bcrypt is slow on purpose, so a check runs on a blocking thread, at most
//! one per core at once (a flood of wrong passwords cannot take every
//! blocking thread), and a success is remembered, keyed by the user and
//! the SHA-256 of the password, so a scraper that sends the same
//! credentials every 15 s costs one bcrypt run, not one per scrape. The
//! memory is bounded ([`CACHE_MAX`] entries; emptied when full). An
//! unknown user costs a bcrypt run too (against the first user's hash, then
//! refused whatever the outcome), so response times do not tell which user
//! names exist.

use std::collections::{BTreeMap, HashSet};
use std::sync::{Arc, Mutex};

use axum::extract::{Request, State};
use axum::http::{header, HeaderValue};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::Router;
use base64::engine::general_purpose::STANDARD;
use base64::Engine as _;
use prometheus::IntCounter;
use tokio::sync::Semaphore;

use crate::alarm::token::Token;
use crate::http::error::ApiError;

/// Most remembered successful verifications.
pub const CACHE_MAX: usize = 1024;

/// The `WWW-Authenticate` value of a 401.
pub const CHALLENGE: &str = "Basic realm=\"bandwatch\"";

/// The users, the operator token, the cache and the failure counter.
pub struct BasicAuth {
    users: BTreeMap<String, String>,
    token: Option<Token>,
    /// (user, SHA-256 of the password) of recent successes.
    cache: Mutex<HashSet<(String, [u8; 32])>>,
    bcrypt: Semaphore,
    failures: IntCounter,
}

impl BasicAuth {
    /// `users`: name to bcrypt hash (checked by `config::web`); `token`:
    /// the operator token, which is accepted as well.
    pub fn new(
        users: BTreeMap<String, String>,
        token: Option<Token>,
        failures: IntCounter,
    ) -> BasicAuth {
        let cores = std::thread::available_parallelism().map_or(1, std::num::NonZero::get);
        BasicAuth {
            users,
            token,
            cache: Mutex::new(HashSet::new()),
            bcrypt: Semaphore::new(cores),
            failures,
        }
    }

    /// Whether a request with this `Authorization` value may in.
    pub async fn admits(&self, authorization: Option<&str>) -> bool {
        let Some(value) = authorization else {
            return false;
        };
        if let Some(t) = &self.token {
            if crate::alarm::token::parse_bearer(value).is_some() {
                return t.authorizes(Some(value));
            }
        }
        let Some((user, password)) = parse_basic(value) else {
            return false;
        };
        let key = (user.clone(), sha256(password.as_bytes()));
        if lock(&self.cache).contains(&key) {
            return true;
        }
        let (hash, known) = match self.users.get(&user) {
            Some(h) => (h.clone(), true),
            None => match self.users.values().next() {
                Some(h) => (h.clone(), false),
                None => return false,
            },
        };
        let Ok(_permit) = self.bcrypt.acquire().await else {
            return false;
        };
        let ok = tokio::task::spawn_blocking(move || bcrypt::verify(password, &hash))
            .await
            .is_ok_and(|r| r.unwrap_or(false))
            && known;
        if ok {
            let mut c = lock(&self.cache);
            if c.len() >= CACHE_MAX {
                c.clear();
            }
            c.insert(key);
        }
        ok
    }
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

fn sha256(b: &[u8]) -> [u8; 32] {
    let d = ring::digest::digest(&ring::digest::SHA256, b);
    let mut out = [0u8; 32];
    out.copy_from_slice(d.as_ref());
    out
}

/// User and password of an `Authorization: Basic <base64(user:password)>`
/// value (RFC 7617 §2: scheme case-insensitive, the user ends at the first
/// colon). Anything else: `None`.
pub fn parse_basic(value: &str) -> Option<(String, String)> {
    let (scheme, rest) = value.trim().split_once(' ')?;
    if !scheme.eq_ignore_ascii_case("basic") {
        return None;
    }
    let decoded = STANDARD.decode(rest.trim()).ok()?;
    let text = String::from_utf8(decoded).ok()?;
    let (user, password) = text.split_once(':')?;
    Some((user.to_string(), password.to_string()))
}

/// `app` with every route behind `auth`.
pub fn require(app: Router, auth: Arc<BasicAuth>) -> Router {
    app.layer(middleware::from_fn_with_state(auth, gate))
}

async fn gate(State(auth): State<Arc<BasicAuth>>, req: Request, next: Next) -> Response {
    let given = req
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok());
    if auth.admits(given).await {
        return next.run(req).await;
    }
    auth.failures.inc();
    let mut r = ApiError::Unauthorized.into_response();
    r.headers_mut().insert(
        header::WWW_AUTHENTICATE,
        HeaderValue::from_static(CHALLENGE),
    );
    r
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn basic_credentials_parse() {
        // RFC 7617 §2's example: "Aladdin" / "open sesame".
        assert_eq!(
            parse_basic("Basic QWxhZGRpbjpvcGVuIHNlc2FtZQ=="),
            Some(("Aladdin".into(), "open sesame".into()))
        );
        // The password may hold colons; the user ends at the first one.
        // base64("u:a:b") = "dTphOmI=" (python3 base64.b64encode, checked).
        assert_eq!(
            parse_basic("basic dTphOmI="),
            Some(("u".into(), "a:b".into()))
        );
        assert_eq!(parse_basic("Bearer QWxhZGRpbjpvcGVuIHNlc2FtZQ=="), None);
        assert_eq!(parse_basic("Basic !!!!"), None);
        assert_eq!(parse_basic("Basic QQ="), None); // not a multiple of 4
        assert_eq!(parse_basic("Basic dXNlcg=="), None); // "user": no colon
    }

    #[tokio::test]
    async fn admits_right_password_and_token_only() {
        let hash = bcrypt::hash("s3cret", 4).expect("hash");
        let users = BTreeMap::from([("scraper".to_string(), hash)]);
        let token = Token::new("operator-token-0123456789", "test").expect("token");
        let failures = IntCounter::new("f", "f").expect("counter");
        let auth = BasicAuth::new(users, Some(token), failures);
        let basic = |u: &str, p: &str| {
            let raw = format!("{u}:{p}");
            format!("Basic {}", STANDARD.encode(raw.as_bytes()))
        };
        assert!(auth.admits(Some(&basic("scraper", "s3cret"))).await);
        // Again, from the cache.
        assert_eq!(lock(&auth.cache).len(), 1);
        assert!(auth.admits(Some(&basic("scraper", "s3cret"))).await);
        assert!(!auth.admits(Some(&basic("scraper", "wrong"))).await);
        assert!(!auth.admits(Some(&basic("nobody", "s3cret"))).await);
        assert!(!auth.admits(None).await);
        assert!(auth.admits(Some("Bearer operator-token-0123456789")).await);
        assert!(!auth.admits(Some("Bearer operator-token-wrong-00000")).await);
        assert_eq!(lock(&auth.cache).len(), 1);
    }
}
