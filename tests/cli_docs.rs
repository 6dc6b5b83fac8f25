//! `bandwatch completions SHELL` and `bandwatch man --out-dir DIR`, checked
//! from outside: the commands are read from the binary's own `--help`, the
//! bash script is sourced and asked for completions by a real bash (its
//! programmable-completion interface: COMP_WORDS, COMP_CWORD, COMPREPLY, as
//! the bash manual describes it), and the man pages are rendered by groff
//! where it is installed (man-db's formatter; CI installs it).

use std::collections::BTreeSet;
use std::path::Path;
use std::process::{Command, Output};

const BIN: &str = env!("CARGO_BIN_EXE_bandwatch");

/// Commands this test knows must exist, whatever else is added.
const KNOWN: &[&str] = &[
    "run",
    "check",
    "send",
    "record",
    "replay",
    "selftest",
    "bench",
    "soak",
    "completions",
    "man",
];

fn bandwatch(args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .output()
        .unwrap_or_else(|e| panic!("cannot run {BIN}: {e}"))
}

fn stdout_ok(args: &[&str]) -> String {
    let out = bandwatch(args);
    assert!(
        out.status.success(),
        "bandwatch {args:?}: {:?}\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("UTF-8 output")
}

/// The commands `bandwatch --help` lists (clap's "Commands:" section), with
/// the help text of each, `help` itself left out.
fn commands() -> Vec<(String, String)> {
    let help = stdout_ok(&["--help"]);
    let mut out = Vec::new();
    let mut on = false;
    for line in help.lines() {
        if line.starts_with("Commands:") {
            on = true;
            continue;
        }
        if on {
            if line.trim().is_empty() || !line.starts_with(' ') {
                break;
            }
            let mut parts = line.split_whitespace();
            let name = parts.next().unwrap_or_default().to_string();
            let text = parts.collect::<Vec<_>>().join(" ");
            if name != "help" {
                out.push((name, text));
            }
        }
    }
    let names: BTreeSet<&str> = out.iter().map(|(n, _)| n.as_str()).collect();
    for k in KNOWN {
        assert!(
            names.contains(k),
            "`bandwatch --help` does not list {k}: {help}"
        );
    }
    out
}

#[test]
fn every_command_has_a_help_text() {
    for (name, text) in commands() {
        assert!(!text.is_empty(), "command {name} has no help text");
    }
    let c = stdout_ok(&["completions", "--help"]);
    assert!(c.contains("shell completion script"), "{c}");
    for shell in ["bash", "elvish", "fish", "powershell", "zsh"] {
        assert!(
            c.contains(&format!("- {shell}:")),
            "{shell} not listed: {c}"
        );
    }
    let m = stdout_ok(&["man", "--help"]);
    assert!(m.contains("--out-dir <OUT_DIR>"), "{m}");
    assert!(m.contains("Directory for the pages"), "{m}");
}

#[test]
fn an_unknown_shell_is_a_usage_error() {
    let out = bandwatch(&["completions", "tcsh"]);
    assert_eq!(out.status.code(), Some(2), "{out:?}");
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("invalid value 'tcsh'"), "{err}");
    assert!(out.stdout.is_empty());
}

#[test]
fn completion_scripts_name_every_command() {
    let commands = commands();
    for shell in ["bash", "zsh", "fish", "elvish", "powershell"] {
        let script = stdout_ok(&["completions", shell]);
        for (name, _) in &commands {
            assert!(
                script.contains(name.as_str()),
                "{shell} completion lacks the command {name}"
            );
        }
    }
}

/// Runs bash with the generated script sourced and asks it to complete
/// `words` (the last one being completed); returns COMPREPLY.
fn bash_complete(script: &Path, words: &[&str]) -> Option<Vec<String>> {
    let quoted: Vec<String> = words.iter().map(|w| format!("'{w}'")).collect();
    let line = words.join(" ");
    let program = format!(
        "source '{}' || exit 3\n\
         COMP_WORDS=({})\n\
         COMP_CWORD={}\n\
         COMP_LINE='{line}'\n\
         COMP_POINT=${{#COMP_LINE}}\n\
         _bandwatch bandwatch '{}' '{}'\n\
         printf '%s\\n' \"${{COMPREPLY[@]}}\"\n",
        script.display(),
        quoted.join(" "),
        words.len() - 1,
        words[words.len() - 1],
        words[words.len().saturating_sub(2)],
    );
    let out = match Command::new("bash")
        .args(["--norc", "--noprofile", "-c", &program])
        .output()
    {
        Ok(o) => o,
        Err(e) => {
            eprintln!("SKIPPED: bash cannot be run here ({e})");
            return None;
        }
    };
    assert!(
        out.status.success(),
        "bash: {:?}\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    Some(
        String::from_utf8_lossy(&out.stdout)
            .lines()
            .map(str::to_string)
            .collect(),
    )
}

#[test]
fn bash_completes_commands_and_options() {
    let dir = tempfile_dir("bash");
    let script = dir.join("bandwatch.bash");
    std::fs::write(&script, stdout_ok(&["completions", "bash"])).expect("write script");

    let Some(all) = bash_complete(&script, &["bandwatch", ""]) else {
        return;
    };
    for (name, _) in commands() {
        assert!(all.contains(&name), "bash offers {all:?}, not {name}");
    }
    let ch = bash_complete(&script, &["bandwatch", "ch"]).unwrap_or_default();
    assert_eq!(ch, vec!["check".to_string()], "`bandwatch ch<TAB>`");
    let run = bash_complete(&script, &["bandwatch", "run", "--"]).unwrap_or_default();
    assert!(run.contains(&"--config".to_string()), "{run:?}");
    let shells = bash_complete(&script, &["bandwatch", "completions", ""]).unwrap_or_default();
    for s in ["bash", "zsh", "fish"] {
        assert!(shells.contains(&s.to_string()), "{shells:?}");
    }
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn man_pages_render_and_name_every_command() {
    let dir = tempfile_dir("man");
    let out_dir = dir.join("pages");
    stdout_ok(&["man", "--out-dir", out_dir.to_str().expect("UTF-8 path")]);
    let commands = commands();

    let main = std::fs::read_to_string(out_dir.join("bandwatch.1")).expect("bandwatch.1");
    assert!(
        main.starts_with(".ie") || main.contains("\n.TH "),
        "not roff"
    );
    assert!(main.contains(".TH bandwatch 1"), "{main}");
    for (name, _) in &commands {
        let page = out_dir.join(format!("bandwatch-{name}.1"));
        let text =
            std::fs::read_to_string(&page).unwrap_or_else(|e| panic!("{}: {e}", page.display()));
        assert!(
            text.contains(&format!(".TH bandwatch-{name} 1")),
            "{}",
            page.display()
        );
    }

    // Rendered as man(1) would: the page names every command, and groff
    // has no warning (-ww: all of them) about the markup.
    let rendered = Command::new("groff")
        .args(["-man", "-Tutf8", "-ww"])
        .arg(out_dir.join("bandwatch.1"))
        .env("GROFF_NO_SGR", "1")
        .output();
    match rendered {
        Err(e) => eprintln!("SKIPPED rendering: groff cannot be run here ({e})"),
        Ok(r) => {
            let warnings = String::from_utf8_lossy(&r.stderr);
            assert!(
                r.status.success() && warnings.trim().is_empty(),
                "{warnings}"
            );
            // Plain text: undo grotty's overstrike (bold "x BS x",
            // underline "_ BS x"): a backspace drops the character before it.
            let mut text = String::new();
            for c in String::from_utf8_lossy(&r.stdout).chars() {
                if c == '\u{8}' {
                    text.pop();
                } else {
                    text.push(c);
                }
            }
            assert!(text.contains("NAME"), "{text}");
            assert!(text.contains("bandwatch"), "{text}");
            assert!(text.contains("SUBCOMMANDS"), "{text}");
            for (name, _) in &commands {
                assert!(
                    text.contains(&format!("bandwatch-{name}(1)")),
                    "the rendered page does not name {name}:\n{text}"
                );
            }
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
}

/// A fresh directory under the system's temp dir for one test.
fn tempfile_dir(tag: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!(
        "bandwatch-cli-docs-{tag}-{}-{}",
        std::process::id(),
        std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_nanos())
    ));
    std::fs::create_dir_all(&dir).expect("temp dir");
    dir
}
