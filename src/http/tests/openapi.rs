//! The OpenAPI document (`http::openapi`) against the router it describes:
//!
//! - drift: the set of (method, path) in the document equals the set of
//!   routes `router_with` registers (read from its source, `.route(...)`
//!   by `.route(...)`), and every documented operation reaches its own
//!   handler through the real router (not the fallback's 404, not a 405),
//!   answering one of the statuses the document lists for it;
//! - query strings: each handler's list of accepted keys (its 400 for an
//!   unknown key names them) equals the document's query parameters;
//! - a well-formed OpenAPI 3.1 document: `openapi` "3.1.0" (the version
//!   whose `type: [T, "null"]` the nullable fields use; OpenAPI
//!   Specification 3.1.0, section 4.8.24 "Schema Object" defers to JSON
//!   Schema 2020-12), every `$ref` resolves, every path template variable
//!   is a declared path parameter and back, every operation has a 2xx,
//!   every JSON error is an `ErrorBody` (or the reload's refusal), and the
//!   bearer token is asked on exactly the token-guarded POSTs, which
//!   document their 401.

use std::collections::BTreeSet;

use utoipa::OpenApi;

use super::*;
use crate::http::openapi::ApiDoc;

fn doc() -> Value {
    serde_json::to_value(ApiDoc::openapi()).expect("the document serialises")
}

/// (METHOD, path) of every `.route(...)` in `router_with`'s source.
fn registered() -> BTreeSet<(String, String)> {
    let src = include_str!("../mod.rs");
    let start = src
        .find("pub fn router_with")
        .expect("router_with in mod.rs");
    let body = &src[start..];
    let body = &body[..body.find("\n}\n").expect("end of router_with")];
    let mut out = BTreeSet::new();
    let mut rest = body;
    while let Some(i) = rest.find(".route(") {
        rest = &rest[i + ".route(".len()..];
        // The call's text, to its closing parenthesis.
        let mut depth = 1;
        let end = rest
            .char_indices()
            .find(|&(_, c)| {
                match c {
                    '(' => depth += 1,
                    ')' => depth -= 1,
                    _ => {}
                }
                depth == 0
            })
            .map(|(j, _)| j)
            .expect("closing parenthesis of .route(");
        let call = &rest[..end];
        let q1 = call.find('"').expect("path literal");
        let q2 = q1 + 1 + call[q1 + 1..].find('"').expect("path literal end");
        let path = &call[q1 + 1..q2];
        let mut methods = 0;
        for m in ["get", "post", "put", "delete", "patch", "head", "options"] {
            let tail = &call[q2..];
            let hit = tail.match_indices(&format!("{m}(")).any(|(k, _)| {
                k == 0
                    || !tail[..k]
                        .chars()
                        .last()
                        .is_some_and(|c| c.is_alphanumeric() || c == '_')
            });
            if hit {
                out.insert((m.to_uppercase(), path.to_string()));
                methods += 1;
            }
        }
        assert!(methods > 0, "no method in .route({call})");
        rest = &rest[end..];
    }
    out
}

fn documented(doc: &Value) -> BTreeSet<(String, String)> {
    let mut out = BTreeSet::new();
    for (path, item) in doc["paths"].as_object().expect("paths") {
        for method in item.as_object().expect("path item").keys() {
            out.insert((method.to_uppercase(), path.clone()));
        }
    }
    out
}

#[test]
fn the_document_lists_exactly_the_routes_the_router_serves() {
    let routes = registered();
    assert!(routes.len() >= 19, "parsed only {routes:?}");
    assert!(routes.contains(&(
        "POST".into(),
        "/api/v1/alarms/{channel}/{band}/relearn".into()
    )));
    let doc = doc();
    let documented = documented(&doc);
    let missing: Vec<_> = routes.difference(&documented).collect();
    let extra: Vec<_> = documented.difference(&routes).collect();
    assert!(
        missing.is_empty() && extra.is_empty(),
        "routes without a document entry: {missing:?}; documented but not routed: {extra:?}"
    );
}

/// The operation of `doc` at (method, path).
fn operation<'a>(doc: &'a Value, method: &str, path: &str) -> &'a Value {
    &doc["paths"][path][method.to_lowercase()]
}

#[tokio::test]
async fn every_documented_operation_reaches_its_handler_with_a_documented_status() {
    let st = ready_state();
    let doc = doc();
    for (method, path) in documented(&doc) {
        // Path variables: a file the page has, else a name nobody has
        // (each handler answers its own 404 for it, not the fallback's).
        let uri = path
            .replace("/assets/{name}", "/assets/app.js")
            .replace(['{', '}'], "")
            .replace("name", "no-such")
            .replace("channel/band", "no-such/none")
            .replace("/id", "/no-such");
        let uri = if path.contains('{') {
            uri
        } else {
            path.clone()
        };
        let r = call(router(st.clone()), &method, &uri).await;
        assert_ne!(r.status, StatusCode::METHOD_NOT_ALLOWED, "{method} {uri}");
        if r.status == StatusCode::NOT_FOUND {
            assert_ne!(
                r.json()["error"],
                "no such endpoint",
                "{method} {uri} fell through to the fallback"
            );
        }
        let op = operation(&doc, &method, &path);
        assert!(
            op["responses"][r.status.as_str()].is_object(),
            "{method} {uri} answered {} which its operation does not list: {}",
            r.status,
            r.body
        );
    }
}

#[tokio::test]
async fn each_handler_takes_exactly_the_documented_query_keys() {
    let st = ready_state();
    let doc = doc();
    let mut checked = 0;
    for (method, path) in documented(&doc) {
        let op = operation(&doc, &method, &path);
        let query: Vec<&str> = op["parameters"]
            .as_array()
            .map(|ps| {
                ps.iter()
                    .filter(|p| p["in"] == "query")
                    .filter_map(|p| p["name"].as_str())
                    .collect()
            })
            .unwrap_or_default();
        if query.is_empty() {
            continue;
        }
        let uri = path.replace("{name}", "a").replace("{id}", "x").to_string() + "?zz-not-a-key=1";
        let r = call(router(st.clone()), &method, &uri).await;
        assert_json_error(
            &r,
            StatusCode::BAD_REQUEST,
            &format!("(known: {})", query.join(", ")),
        );
        checked += 1;
    }
    // spectrum, waveform, trend, projection, one capture, a capture's
    // waveform; the history's trend, spectra list, one spectrum,
    // waterfall, compare.
    assert_eq!(checked, 11);
}

/// Every `$ref` in `v`.
fn refs<'a>(v: &'a Value, out: &mut Vec<&'a str>) {
    match v {
        Value::Object(m) => {
            for (k, x) in m {
                match (k.as_str(), x) {
                    ("$ref", Value::String(r)) => out.push(r),
                    _ => refs(x, out),
                }
            }
        }
        Value::Array(a) => a.iter().for_each(|x| refs(x, out)),
        _ => {}
    }
}

#[test]
fn the_document_is_well_formed_openapi_3_1() {
    let doc = doc();
    assert_eq!(doc["openapi"], "3.1.0");
    assert!(doc["info"]["title"].is_string() && doc["info"]["version"].is_string());
    let mut all = Vec::new();
    refs(&doc, &mut all);
    assert!(all.len() > 20, "{all:?}");
    for r in all {
        let target = r
            .strip_prefix('#')
            .and_then(|p| doc.pointer(p))
            .unwrap_or_else(|| panic!("$ref {r} does not resolve"));
        assert!(target.is_object(), "$ref {r}");
    }
    let mut guarded = BTreeSet::new();
    for (method, path) in documented(&doc) {
        let op = operation(&doc, &method, &path);
        let what = format!("{method} {path}");
        // Path variables and path parameters, both ways.
        let vars: BTreeSet<String> = path
            .split('/')
            .filter_map(|s| s.strip_prefix('{').and_then(|s| s.strip_suffix('}')))
            .map(str::to_string)
            .collect();
        let params: BTreeSet<String> = op["parameters"]
            .as_array()
            .map(|ps| {
                ps.iter()
                    .filter(|p| p["in"] == "path")
                    .inspect(|p| assert_eq!(p["required"], true, "{what}"))
                    .filter_map(|p| p["name"].as_str().map(str::to_string))
                    .collect()
            })
            .unwrap_or_default();
        assert_eq!(vars, params, "{what}");
        let responses = op["responses"].as_object().expect("responses");
        assert!(
            responses.keys().any(|s| s.starts_with('2')),
            "{what} has no 2xx"
        );
        for (status, resp) in responses {
            assert!(resp["description"].is_string(), "{what} {status}");
            if status.starts_with('4') || status.starts_with('5') {
                let schema = &resp["content"]["application/json"]["schema"]["$ref"];
                let ok = schema == "#/components/schemas/ErrorBody"
                    || (path == "/api/v1/reload"
                        && status == "422"
                        && schema == "#/components/schemas/ReloadRefused");
                assert!(ok, "{what} {status}: {resp}");
            }
        }
        if let Some(sec) = op["security"].as_array() {
            assert_eq!(sec, &vec![serde_json::json!({ "bearer": [] })], "{what}");
            assert!(responses.contains_key("401"), "{what} without 401");
            guarded.insert(what);
        }
    }
    let expected: BTreeSet<String> = [
        "POST /api/v1/alarms/{channel}/{band}/ack",
        "POST /api/v1/alarms/{channel}/{band}/relearn",
        "POST /api/v1/history/channels/{name}/spectra",
        "POST /api/v1/history/spectra/{id}/reference",
        "POST /api/v1/reload",
    ]
    .map(String::from)
    .into();
    assert_eq!(guarded, expected);
    assert_eq!(
        doc["components"]["securitySchemes"]["bearer"],
        serde_json::json!({ "type": "http", "scheme": "bearer",
            "description": doc["components"]["securitySchemes"]["bearer"]["description"] })
    );
}

#[tokio::test]
async fn the_document_is_served_as_json() {
    let r = get(&state(), "/api/v1/openapi.json").await;
    assert_eq!(r.status, StatusCode::OK);
    assert_eq!(r.content_type, "application/json");
    assert_eq!(r.json(), doc());
}

/// Where the JSON can be null, the schema says so: the trend's points
/// without an ok value, the limits without an alarm, and the spectrum's
/// values beyond f32 (null in JSON, as serde_json writes non-finite
/// floats).
#[test]
fn nullable_where_the_json_can_be_null() {
    let doc = doc();
    let s = &doc["components"]["schemas"];
    let nullable = |schema: &Value| -> bool {
        schema["type"]
            .as_array()
            .is_some_and(|t| t.contains(&Value::from("null")))
            || schema["oneOf"]
                .as_array()
                .is_some_and(|o| o.iter().any(|x| x["type"] == "null"))
    };
    for col in ["min", "max", "last"] {
        assert!(
            nullable(&s["TrendSeries"]["properties"][col]["items"]),
            "{col}"
        );
    }
    assert!(nullable(&s["TrendSeries"]["properties"]["alert_limit"]));
    assert!(nullable(
        &s["SpectrumBody"]["properties"]["values"]["items"]
    ));
    assert!(nullable(&s["AlarmBody"]["properties"]["value"]));
    assert!(nullable(
        &s["ChannelSummary"]["properties"]["spectrum_age_seconds"]
    ));
    assert!(!nullable(
        &s["ChannelSummary"]["properties"]["sample_rate_hz"]
    ));
    // serde_json writes a non-finite f32 as null: why the spectrum's
    // values are nullable.
    assert_eq!(
        serde_json::to_string(&[f32::INFINITY, 1.0]).expect("serialises"),
        "[null,1.0]"
    );
}
