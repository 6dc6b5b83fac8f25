//! Log output on stderr, one event per line (what journald stores as one
//! entry): `text` (tracing-subscriber's format; ANSI colour only when
//! stderr is a terminal and `NO_COLOR` is unset or empty) or `json`.
//!
//! JSON is our own small formatter ([`JsonLines`]), not tracing-subscriber's
//! JSON layer: that layer writes every value captured with `?` or `%` as a
//! string, so a list or a map could only come out as a quoted Rust debug
//! string (structured values need tracing's unstable `valuable` support).
//! Here a field keeps its JSON type: integers and floats are numbers
//! (non-finite floats are the strings "NaN", "inf", "-inf"), booleans are
//! booleans, an absent `Option` is absent, and a field whose text is a JSON
//! array or object (call sites pass lists and maps as
//! `%serde_json::to_string(..)`) is embedded as that array or object.
//! Every line has `timestamp` (RFC 3339, UTC), `level`, `target` and
//! `message`.

use std::fmt;
use std::io::IsTerminal as _;

use serde_json::{Map, Value};
use tracing::field::{Field, Visit};
use tracing::{Event, Subscriber};
use tracing_subscriber::fmt::format::Writer;
use tracing_subscriber::fmt::{FmtContext, FormatEvent, FormatFields};
use tracing_subscriber::registry::LookupSpan;
use tracing_subscriber::EnvFilter;

/// `--log-format`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Text,
    Json,
}

/// Colour on stderr: a terminal, and `NO_COLOR` unset or empty
/// (no-color.org's convention).
pub fn colour_wanted() -> bool {
    let no_color = std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty());
    !no_color && std::io::stderr().is_terminal()
}

/// Installs the global subscriber (filter from `RUST_LOG`, default `info`).
pub fn init(format: Format) {
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    match format {
        Format::Text => builder.with_ansi(colour_wanted()).init(),
        Format::Json => builder.with_ansi(false).event_format(JsonLines).init(),
    }
}

/// One JSON object per event, on one line (see the module docs).
#[derive(Debug, Clone, Copy, Default)]
pub struct JsonLines;

impl<S, N> FormatEvent<S, N> for JsonLines
where
    S: Subscriber + for<'a> LookupSpan<'a>,
    N: for<'a> FormatFields<'a> + 'static,
{
    fn format_event(
        &self,
        _ctx: &FmtContext<'_, S, N>,
        mut writer: Writer<'_>,
        event: &Event<'_>,
    ) -> fmt::Result {
        writeln!(writer, "{}", event_json(event))
    }
}

/// The JSON object of one event.
pub fn event_json(event: &Event<'_>) -> Value {
    let meta = event.metadata();
    let mut fields = Map::new();
    event.record(&mut JsonVisitor(&mut fields));
    let mut out = Map::new();
    let now = time::OffsetDateTime::now_utc()
        .format(&time::format_description::well_known::Rfc3339)
        .unwrap_or_default();
    out.insert("timestamp".into(), Value::String(now));
    out.insert("level".into(), Value::String(meta.level().to_string()));
    out.insert("target".into(), Value::String(meta.target().to_string()));
    for (k, v) in fields {
        // A field named like one of the fixed keys keeps its value apart.
        let key = if out.contains_key(&k) {
            format!("field.{k}")
        } else {
            k
        };
        out.insert(key, v);
    }
    Value::Object(out)
}

/// Records fields with their JSON types.
struct JsonVisitor<'a>(&'a mut Map<String, Value>);

impl JsonVisitor<'_> {
    fn put(&mut self, field: &Field, v: Value) {
        self.0.insert(field.name().to_string(), v);
    }
}

/// `text` as a JSON value: an array or object when it is the JSON text of
/// one, else the string.
fn text_value(text: String) -> Value {
    let t = text.trim_start();
    if t.starts_with('[') || t.starts_with('{') {
        if let Ok(v @ (Value::Array(_) | Value::Object(_))) = serde_json::from_str::<Value>(t) {
            return v;
        }
    }
    Value::String(text)
}

impl Visit for JsonVisitor<'_> {
    fn record_f64(&mut self, field: &Field, value: f64) {
        let v = serde_json::Number::from_f64(value).map_or_else(
            || {
                Value::String(
                    if value.is_nan() {
                        "NaN"
                    } else if value > 0.0 {
                        "inf"
                    } else {
                        "-inf"
                    }
                    .into(),
                )
            },
            Value::Number,
        );
        self.put(field, v);
    }
    fn record_i64(&mut self, field: &Field, value: i64) {
        self.put(field, Value::from(value));
    }
    fn record_u64(&mut self, field: &Field, value: u64) {
        self.put(field, Value::from(value));
    }
    fn record_i128(&mut self, field: &Field, value: i128) {
        let v = i64::try_from(value).map_or_else(|_| Value::String(value.to_string()), Value::from);
        self.put(field, v);
    }
    fn record_u128(&mut self, field: &Field, value: u128) {
        let v = u64::try_from(value).map_or_else(|_| Value::String(value.to_string()), Value::from);
        self.put(field, v);
    }
    fn record_bool(&mut self, field: &Field, value: bool) {
        self.put(field, Value::Bool(value));
    }
    fn record_str(&mut self, field: &Field, value: &str) {
        self.put(field, Value::String(value.to_string()));
    }
    fn record_error(&mut self, field: &Field, value: &(dyn std::error::Error + 'static)) {
        self.put(field, Value::String(value.to_string()));
    }
    fn record_debug(&mut self, field: &Field, value: &dyn fmt::Debug) {
        let text = format!("{value:?}");
        if field.name() == "message" {
            self.put(field, Value::String(text));
        } else {
            self.put(field, text_value(text));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::{Arc, Mutex};

    #[derive(Clone, Default)]
    struct Buf(Arc<Mutex<Vec<u8>>>);

    impl std::io::Write for Buf {
        fn write(&mut self, b: &[u8]) -> std::io::Result<usize> {
            self.0
                .lock()
                .map_err(|_| std::io::ErrorKind::Other)?
                .extend_from_slice(b);
            Ok(b.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }

    #[test]
    fn fields_keep_their_json_types() {
        let buf = Buf::default();
        let w = buf.clone();
        let sub = tracing_subscriber::fmt()
            .with_writer(move || w.clone())
            .event_format(JsonLines)
            .finish();
        tracing::subscriber::with_default(sub, || {
            let none: Option<f64> = None;
            let rejected = std::collections::BTreeMap::from([("channel_count_mismatch", 16u64)]);
            tracing::warn!(
                n = 3u64,
                x = 0.5,
                neg = -2i64,
                ok = true,
                absent = none,
                present = Some(1.5),
                list = %serde_json::to_string(&["a", "b"]).unwrap_or_default(),
                rejected = %serde_json::to_string(&rejected).unwrap_or_default(),
                who = %"pump",
                bracket = %"[not json",
                nan = f64::NAN,
                "hello {}", 1
            );
        });
        let bytes = buf.0.lock().expect("lock").clone();
        let text = String::from_utf8(bytes).expect("utf8");
        assert_eq!(text.lines().count(), 1, "{text}");
        let v: Value = serde_json::from_str(text.trim()).expect("one JSON object");
        assert_eq!(v["level"], "WARN");
        assert_eq!(v["message"], "hello 1");
        assert_eq!(v["n"], 3);
        assert_eq!(v["x"], 0.5);
        assert_eq!(v["neg"], -2);
        assert_eq!(v["ok"], true);
        assert!(v.get("absent").is_none(), "{v}");
        assert_eq!(v["present"], 1.5);
        assert_eq!(v["list"], serde_json::json!(["a", "b"]));
        assert_eq!(
            v["rejected"],
            serde_json::json!({"channel_count_mismatch": 16})
        );
        assert_eq!(v["who"], "pump");
        assert_eq!(v["bracket"], "[not json");
        assert_eq!(v["nan"], "NaN");
        assert!(
            v["timestamp"].as_str().is_some_and(|t| t.ends_with('Z')),
            "{v}"
        );
    }
}
