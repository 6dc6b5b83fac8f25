//! The layer rule of the project's DEVELOPERS.md, checked on the sources:
//! a module imports only from layers below its own, so data flows one way
//! (sources -> rings -> DSP -> alarms / published state -> HTTP) and the
//! module graph has no cycle. And only `src/pipeline/` assembles the
//! pipeline (rings, DSP workers, alarm engines).
//!
//! The check reads every `.rs` file under `src/`, drops comments, and
//! collects each `crate::<module>` path (and `bandwatch::<module>` in
//! `main.rs`). Each top-level module has a rank; an import must go to a
//! strictly lower rank. Modules of one layer that must not know each other
//! (a source and the alarm stage) share a rank, so an import between them
//! fails as well.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// (module, rank, layer) from the bottom up. Finer than the five layers of
/// DEVELOPERS.md where one module of a layer builds on another (the config
/// names frame sample formats; a source writes into rings; the alarm stage
/// uses DSP kernels for its health moments).
const RANKS: &[(&str, u32, &str)] = &[
    ("units", 0, "foundation"),
    ("clock", 0, "foundation"),
    ("noise", 0, "foundation"),
    ("shutdown", 0, "foundation"),
    ("counters", 1, "foundation"),
    ("frame", 2, "foundation"),
    ("config", 3, "foundation"),
    ("ring", 4, "stages"),
    ("dsp", 5, "stages"),
    ("source", 6, "stages"),
    ("alarm", 6, "stages"),
    ("history", 6, "stages"),
    ("pipeline", 7, "assembly"),
    ("http", 8, "serving"),
    ("daemon", 9, "commands"),
    ("tools", 9, "commands"),
    ("lib", 10, "crate root"),
    ("main", 10, "crate root"),
];

/// Items `lib.rs` re-exports at the crate root, and the module that owns each.
const ROOT_ITEMS: &[(&str, &str)] = &[
    ("serve", "daemon"),
    ("Pipeline", "pipeline"),
    ("RunError", "pipeline"),
];

fn rank(module: &str) -> Option<(u32, &'static str)> {
    RANKS
        .iter()
        .find(|(m, ..)| *m == module)
        .map(|(_, r, l)| (*r, *l))
}

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let entries = std::fs::read_dir(dir).expect("read src");
    for e in entries {
        let p = e.expect("dir entry").path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// The top-level module a file belongs to: `src/dsp/bands.rs` -> `dsp`,
/// `src/ring.rs` -> `ring`.
fn module_of(src: &Path, file: &Path) -> String {
    let rel = file.strip_prefix(src).expect("under src");
    let first = rel.components().next().expect("a component");
    let name = first.as_os_str().to_string_lossy();
    name.trim_end_matches(".rs").to_string()
}

/// The text without `//` comments (line, doc and inner doc) or string
/// literals' contents, so a module named in prose or a message is not an
/// import.
fn code_only(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for line in text.lines() {
        let mut in_str = false;
        let mut prev = ' ';
        let mut kept = String::new();
        let chars: Vec<char> = line.chars().collect();
        let mut i = 0;
        while i < chars.len() {
            let c = chars[i];
            if !in_str && c == '/' && chars.get(i + 1) == Some(&'/') {
                break;
            }
            if c == '"' && prev != '\\' {
                in_str = !in_str;
            } else if !in_str {
                kept.push(c);
            }
            prev = if prev == '\\' && c == '\\' { ' ' } else { c };
            i += 1;
        }
        out.push_str(&kept);
        out.push('\n');
    }
    out
}

/// Every `<prefix><module>` in `code` (whole identifiers only).
fn paths_to(code: &str, prefix: &str) -> BTreeSet<String> {
    let mut found = BTreeSet::new();
    let mut rest = code;
    while let Some(i) = rest.find(prefix) {
        let before = rest[..i].chars().last();
        let after = &rest[i + prefix.len()..];
        let name: String = after
            .chars()
            .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
            .collect();
        let whole = !before.is_some_and(|c| c.is_ascii_alphanumeric() || c == '_');
        if whole && !name.is_empty() {
            found.insert(name);
        }
        rest = after;
    }
    found
}

/// Imports between top-level modules: (from, to) -> files.
fn imports() -> BTreeMap<(String, String), Vec<String>> {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    rust_files(&src, &mut files);
    assert!(files.len() > 20, "found only {} source files", files.len());
    let mut edges: BTreeMap<(String, String), Vec<String>> = BTreeMap::new();
    for f in files {
        let from = module_of(&src, &f);
        let text = std::fs::read_to_string(&f).expect("read source");
        let code = code_only(&text);
        let mut targets = paths_to(&code, "crate::");
        if from == "main" {
            targets.extend(paths_to(&code, "bandwatch::"));
        }
        for to in targets {
            let to = ROOT_ITEMS
                .iter()
                .find(|(item, _)| *item == to)
                .map_or(to.clone(), |(_, owner)| owner.to_string());
            if to != from {
                let name = f
                    .strip_prefix(&src)
                    .expect("under src")
                    .display()
                    .to_string();
                edges.entry((from.clone(), to)).or_default().push(name);
            }
        }
    }
    edges
}

#[test]
fn every_import_points_down_a_layer() {
    let edges = imports();
    assert!(
        edges.keys().any(|(f, t)| f == "pipeline" && t == "dsp"),
        "the scan found no pipeline -> dsp import: the check itself is broken"
    );
    let mut wrong = Vec::new();
    for ((from, to), files) in &edges {
        let Some((rf, lf)) = rank(from) else {
            wrong.push(format!(
                "module `{from}` has no layer in tests/layers.rs ({files:?})"
            ));
            continue;
        };
        let Some((rt, lt)) = rank(to) else {
            wrong.push(format!(
                "`{from}` imports `{to}`, which has no layer ({files:?})"
            ));
            continue;
        };
        if rt >= rf {
            wrong.push(format!(
                "`{from}` ({lf}, rank {rf}) imports `{to}` ({lt}, rank {rt}) in {files:?}"
            ));
        }
    }
    assert!(
        wrong.is_empty(),
        "imports that go up or across a layer (see DEVELOPERS.md, Layers):\n{}",
        wrong.join("\n")
    );
}

#[test]
fn the_scan_sees_an_upward_import() {
    // A control: the parser must report an import written like the real
    // ones, and must ignore one in a comment or a string.
    let code = code_only(
        "use crate::http::router; // crate::tools\nlet s = \"crate::daemon\";\nuse crate::dsp::{a, b};\n",
    );
    let found = paths_to(&code, "crate::");
    let expected: BTreeSet<String> = ["http", "dsp"].iter().map(|s| s.to_string()).collect();
    assert_eq!(found, expected);
}

/// Only `src/pipeline/` builds rings, DSP workers and alarm engines (the
/// defining module's own unit tests aside).
#[test]
fn only_the_pipeline_assembles() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    rust_files(&src, &mut files);
    let builders = [
        ("channel_ring(", "ring.rs"),
        ("Workers::start(", "pipeline/"),
        ("ChannelAlarms::new(", "alarm/engine.rs"),
        ("ChannelDsp::new(", "pipeline/"),
        ("ChannelDsp::with_machines(", "pipeline/"),
    ];
    let mut wrong = Vec::new();
    for f in files {
        let rel = f
            .strip_prefix(&src)
            .expect("under src")
            .display()
            .to_string();
        if rel.starts_with("pipeline/") {
            continue;
        }
        let text = std::fs::read_to_string(&f).expect("read source");
        // A module's own unit tests may build what they test.
        let body = text.split("#[cfg(test)]").next().unwrap_or("");
        let code = code_only(body);
        for (call, home) in builders {
            if code.contains(call) && !rel.starts_with(home) {
                wrong.push(format!("{rel} calls {call}"));
            }
        }
    }
    assert!(
        wrong.is_empty(),
        "pipeline parts built outside src/pipeline/ (use pipeline::Builder):\n{}",
        wrong.join("\n")
    );
}
