//! Build-time facts for `bandwatch_build_info` (src/http/metrics/mod.rs):
//! the git commit (`BANDWATCH_GIT_COMMIT`, or "unknown" outside a git
//! checkout; a packager may set it in the environment) and the target
//! triple (`BANDWATCH_TARGET`).

use std::process::Command;

fn git(args: &[&str]) -> Option<String> {
    let out = Command::new("git").args(args).output().ok()?;
    if !out.status.success() {
        return None;
    }
    let s = String::from_utf8(out.stdout).ok()?.trim().to_string();
    (!s.is_empty()).then_some(s)
}

fn main() {
    println!("cargo:rerun-if-env-changed=BANDWATCH_GIT_COMMIT");
    let commit = std::env::var("BANDWATCH_GIT_COMMIT")
        .ok()
        .filter(|s| !s.is_empty())
        .or_else(|| git(&["rev-parse", "--short=12", "HEAD"]))
        .unwrap_or_else(|| "unknown".to_string());
    // Rebuild when HEAD moves (a commit, a checkout): HEAD itself and the
    // branch file it names, wherever this worktree keeps them.
    for p in ["HEAD", "packed-refs"] {
        if let Some(path) = git(&["rev-parse", "--git-path", p]) {
            println!("cargo:rerun-if-changed={path}");
        }
    }
    if let Some(branch) = git(&["symbolic-ref", "-q", "HEAD"]) {
        if let Some(path) = git(&["rev-parse", "--git-path", &branch]) {
            println!("cargo:rerun-if-changed={path}");
        }
    }
    println!("cargo:rustc-env=BANDWATCH_GIT_COMMIT={commit}");
    let target = std::env::var("TARGET").unwrap_or_else(|_| "unknown".to_string());
    println!("cargo:rustc-env=BANDWATCH_TARGET={target}");
}
