//! The operator page's assets through the router (`http::page`): content
//! types, the Content-Security-Policy, caching (ETag, 304), that every file
//! under `assets/web/` is served and nothing the page references lies
//! outside the daemon, and that basic auth covers the page.

use std::collections::BTreeMap;

use axum::http::HeaderMap;
use base64::Engine as _;

use super::*;
use crate::http::page::{ASSETS, CACHE_CONTROL, CSP};

struct Answer {
    status: StatusCode,
    headers: HeaderMap,
    body: Vec<u8>,
}

impl Answer {
    fn header(&self, name: header::HeaderName) -> &str {
        self.headers
            .get(&name)
            .and_then(|v| v.to_str().ok())
            .unwrap_or_else(|| panic!("no {name} header"))
    }
}

async fn fetch(app: Router, uri: &str, extra: &[(header::HeaderName, &str)]) -> Answer {
    let mut req = Request::builder().method("GET").uri(uri);
    for (k, v) in extra {
        req = req.header(k, *v);
    }
    let resp = app
        .oneshot(req.body(Body::empty()).expect("request"))
        .await
        .expect("infallible");
    let status = resp.status();
    let headers = resp.headers().clone();
    let body = resp.into_body().collect().await.expect("body").to_bytes();
    Answer {
        status,
        headers,
        body: body.to_vec(),
    }
}

fn app() -> Router {
    router(state())
}

/// The media types of RFC 9239 (text/javascript for ES modules), RFC 2318
/// (text/css) and the HTML standard (text/html).
fn expected_type(name: &str) -> &'static str {
    match name.rsplit_once('.').map(|(_, e)| e) {
        Some("html") => "text/html; charset=utf-8",
        Some("css") => "text/css; charset=utf-8",
        Some("js") => "text/javascript; charset=utf-8",
        other => panic!("no expected type for extension {other:?}"),
    }
}

/// The security headers every page answer carries.
fn assert_page_headers(a: &Answer, what: &str) {
    let csp = a.header(header::CONTENT_SECURITY_POLICY);
    assert_eq!(csp, CSP, "{what}");
    // CSP Level 3: no 'unsafe-inline'/'unsafe-eval', nothing but 'self'
    // for scripts, styles and connections, no framing.
    for directive in [
        "default-src 'self'",
        "script-src 'self'",
        "style-src 'self'",
        "connect-src 'self'",
        "frame-ancestors 'none'",
        "object-src 'none'",
    ] {
        assert!(
            csp.split(';').any(|d| d.trim() == directive),
            "{what}: CSP lacks {directive:?}: {csp}"
        );
    }
    assert!(!csp.contains("unsafe"), "{what}: {csp}");
    assert!(!csp.contains("http"), "{what}: CSP names a host: {csp}");
    assert_eq!(a.header(header::CACHE_CONTROL), CACHE_CONTROL, "{what}");
    assert_eq!(
        a.header(header::X_CONTENT_TYPE_OPTIONS),
        "nosniff",
        "{what}"
    );
}

#[tokio::test]
async fn index_and_every_asset_served_with_type_csp_and_cache_headers() {
    let root = fetch(app(), "/", &[]).await;
    assert_eq!(root.status, StatusCode::OK);
    assert_eq!(
        root.header(header::CONTENT_TYPE),
        "text/html; charset=utf-8"
    );
    assert_page_headers(&root, "/");
    let html = String::from_utf8(root.body.clone()).expect("utf-8");
    assert!(html.contains(r#"<script type="module" src="/assets/app.js"></script>"#));

    for a in ASSETS {
        let uri = format!("/assets/{}", a.name);
        let got = fetch(app(), &uri, &[]).await;
        assert_eq!(got.status, StatusCode::OK, "{uri}");
        assert_eq!(
            got.header(header::CONTENT_TYPE),
            expected_type(a.name),
            "{uri}"
        );
        assert_page_headers(&got, &uri);
        assert_eq!(got.body, a.body.as_bytes(), "{uri}");
    }
}

#[tokio::test]
async fn unknown_asset_is_a_json_404() {
    for uri in ["/assets/nope.js", "/assets/..%2Fapi.rs", "/assets/"] {
        let got = fetch(app(), uri, &[]).await;
        assert_eq!(got.status, StatusCode::NOT_FOUND, "{uri}");
    }
}

/// RFC 9110 §8.8.3: a strong ETag is a quoted string without `W/`;
/// §13.1.2 + §15.4.5: a GET whose If-None-Match names the current tag is
/// answered 304 with no body; a list naming it or `*` too; another tag 200.
#[tokio::test]
async fn etag_is_strong_and_if_none_match_gives_304() {
    let mut seen = std::collections::BTreeSet::new();
    for a in ASSETS {
        let uri = format!("/assets/{}", a.name);
        let first = fetch(app(), &uri, &[]).await;
        let etag = first.header(header::ETAG).to_string();
        assert!(
            etag.starts_with('"') && etag.ends_with('"') && !etag.starts_with("W/"),
            "{uri}: {etag}"
        );
        // The tag is the SHA-256 of the bytes sent (hex), so it changes
        // whenever a file does.
        let d = ring::digest::digest(&ring::digest::SHA256, &first.body);
        let hex: String = d.as_ref().iter().map(|b| format!("{b:02x}")).collect();
        assert_eq!(etag, format!("\"{hex}\""), "{uri}");
        assert!(
            seen.insert(etag.clone()),
            "{uri}: the same tag as another file"
        );

        let again = fetch(app(), &uri, &[(header::IF_NONE_MATCH, &etag)]).await;
        assert_eq!(again.status, StatusCode::NOT_MODIFIED, "{uri}");
        assert!(again.body.is_empty(), "{uri}: 304 with a body");
        assert_eq!(again.header(header::ETAG), etag);
        assert_page_headers(&again, &uri);

        let listed = format!("\"0000\", {etag}");
        let in_list = fetch(app(), &uri, &[(header::IF_NONE_MATCH, &listed)]).await;
        assert_eq!(in_list.status, StatusCode::NOT_MODIFIED, "{uri}");
        let star = fetch(app(), &uri, &[(header::IF_NONE_MATCH, "*")]).await;
        assert_eq!(star.status, StatusCode::NOT_MODIFIED, "{uri}");

        let stale = fetch(app(), &uri, &[(header::IF_NONE_MATCH, "\"0000\"")]).await;
        assert_eq!(stale.status, StatusCode::OK, "{uri}");
        assert_eq!(stale.body, a.body.as_bytes());
    }
    // `/` is index.html, with its tag.
    let index = fetch(app(), "/assets/index.html", &[]).await;
    let root = fetch(app(), "/", &[]).await;
    assert_eq!(root.header(header::ETAG), index.header(header::ETAG));
}

/// Every file under assets/web/ is embedded (none forgotten), and every
/// local module or file the page names is one that is served.
#[test]
fn assets_on_disk_are_the_served_ones_and_references_resolve() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("assets/web");
    let mut on_disk: Vec<String> = std::fs::read_dir(&dir)
        .expect("assets/web")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    on_disk.sort();
    let mut served: Vec<String> = ASSETS.iter().map(|a| a.name.to_string()).collect();
    served.sort();
    assert_eq!(on_disk, served);

    for a in ASSETS {
        for reference in local_references(a.body) {
            let name = reference
                .trim_start_matches("./")
                .trim_start_matches("/assets/");
            assert!(
                ASSETS.iter().any(|x| x.name == name),
                "{} names {reference:?}, which is not served",
                a.name
            );
        }
    }
}

/// `import … from "X"`, `src="X"` and `href="X"` targets that are files.
fn local_references(text: &str) -> Vec<&str> {
    let mut out = Vec::new();
    for key in ["from \"", "src=\"", "href=\""] {
        for (i, _) in text.match_indices(key) {
            let rest = &text[i + key.len()..];
            let end = rest.find('"').unwrap_or(rest.len());
            let target = &rest[..end];
            if target.ends_with(".js") || target.ends_with(".css") {
                out.push(target);
            }
        }
    }
    out
}

/// The page makes no request outside the daemon: no absolute URL
/// (http:, https:, ws:, protocol-relative //host) anywhere in the assets, no
/// CSS `url(` or `@import` but data:, and every `fetch` or import is a path
/// on this origin. And no inline script or style, which the CSP would
/// block: every `<script>` has a `src` and no body, no `style=` or `on…=`
/// attributes, no `<style>` element.
#[test]
fn assets_reference_nothing_outside_the_daemon_and_nothing_inline() {
    for a in ASSETS {
        let t = a.body;
        for scheme in ["http://", "https://", "ws://", "wss://", "ftp://"] {
            assert!(!t.contains(scheme), "{} contains {scheme}", a.name);
        }
        assert!(
            !t.contains("\"//") && !t.contains("'//") && !t.contains("`//"),
            "{}: protocol-relative URL",
            a.name
        );
        for (i, _) in t.match_indices("url(") {
            assert!(
                t[i + 4..]
                    .trim_start_matches(['"', '\''])
                    .starts_with("data:"),
                "{}: url( at byte {i} is not data:",
                a.name
            );
        }
        assert!(!t.contains("@import"), "{}", a.name);
        for target in local_references(t) {
            assert!(
                target.starts_with("./") || target.starts_with("/assets/"),
                "{}: {target:?} is not a path on this daemon",
                a.name
            );
        }
        for (i, _) in t.match_indices("fetch(") {
            let arg = t[i + 6..].trim_start();
            assert!(
                a.name == "api.js" && arg.starts_with("path"),
                "{}: fetch at byte {i} is not the api.js helper's",
                a.name
            );
        }
        // Every address the scripts write starts at the public API or the
        // page's own files.
        if a.name.ends_with(".js") {
            for q in ['"', '\'', '`'] {
                for (i, _) in t.match_indices(q) {
                    let lit = &t[i + 1..];
                    if lit.starts_with('/') && !lit.starts_with("//") {
                        assert!(
                            lit.starts_with("/api/v1/") || lit.starts_with("/assets/"),
                            "{}: literal at byte {i} names {:?}",
                            a.name,
                            &lit[..lit.len().min(40)]
                        );
                    }
                }
            }
        }
    }
    let html = ASSETS[0].body;
    assert_eq!(ASSETS[0].name, "index.html");
    for (i, _) in html.match_indices("<script") {
        let tag_end = html[i..].find('>').expect("script tag ends") + i;
        assert!(
            html[i..tag_end].contains(" src=\""),
            "inline <script> at {i}"
        );
        assert!(
            html[tag_end + 1..].starts_with("</script>"),
            "<script> with a body at {i}"
        );
    }
    assert!(!html.contains("<style"), "inline <style>");
    assert!(!html.contains(" style=\""), "inline style attribute");
    let lower = html.to_ascii_lowercase();
    for (i, _) in lower.match_indices(" on") {
        let word: String = lower[i + 3..]
            .chars()
            .take_while(char::is_ascii_alphabetic)
            .collect();
        assert!(
            !lower[i + 3 + word.len()..].starts_with('='),
            "inline handler on{word}= at {i}"
        );
    }
}

/// With `[server] web_config` users, basic auth covers the page like every
/// route (README "Serving over the network"): no credentials, 401; right
/// ones, the page.
#[tokio::test]
async fn basic_auth_covers_the_page() {
    let hash = bcrypt::hash("s3cret", 4).expect("hash");
    let users = BTreeMap::from([("viewer".to_string(), hash)]);
    let failures = prometheus::IntCounter::new("f", "f").expect("counter");
    let auth = Arc::new(crate::http::auth::BasicAuth::new(users, None, failures));
    let guarded = crate::http::auth::require(app(), auth);
    let basic = format!(
        "Basic {}",
        base64::engine::general_purpose::STANDARD.encode(b"viewer:s3cret")
    );
    for uri in ["/", "/assets/app.js", "/assets/plot.js"] {
        let denied = fetch(guarded.clone(), uri, &[]).await;
        assert_eq!(denied.status, StatusCode::UNAUTHORIZED, "{uri}");
        assert!(denied.headers.contains_key(header::WWW_AUTHENTICATE));
        let wrong = format!(
            "Basic {}",
            base64::engine::general_purpose::STANDARD.encode(b"viewer:nope")
        );
        let refused = fetch(guarded.clone(), uri, &[(header::AUTHORIZATION, &wrong)]).await;
        assert_eq!(refused.status, StatusCode::UNAUTHORIZED, "{uri}");
        let ok = fetch(guarded.clone(), uri, &[(header::AUTHORIZATION, &basic)]).await;
        assert_eq!(ok.status, StatusCode::OK, "{uri}");
    }
}
