//! Helpers shared by the alarm tests.
#![allow(dead_code)]
#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU32, Ordering};

/// A fresh directory under the system temp dir, removed on drop.
pub struct TempDir(PathBuf);

impl TempDir {
    pub fn new(tag: &str) -> TempDir {
        static N: AtomicU32 = AtomicU32::new(0);
        let p = std::env::temp_dir().join(format!(
            "bandwatch-{tag}-{}-{}",
            std::process::id(),
            N.fetch_add(1, Ordering::Relaxed)
        ));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).unwrap();
        TempDir(p)
    }

    pub fn path(&self) -> &Path {
        &self.0
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// File names in `dir`, sorted.
pub fn names(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .map(|r| {
            r.flatten()
                .filter_map(|e| e.file_name().to_str().map(str::to_string))
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

/// The demo config, sped up `speed` times, storing into `dir`, with
/// pump-de's BPFO alert limit lowered so that it trips at once.
pub fn demo_text(dir: &Path, speed: f64) -> String {
    let text = std::fs::read_to_string("config/demo.toml").unwrap();
    assert!(text.contains("alert = { limit = 0.05 }    # g envelope RMS"));
    text.replace("seed = 2", &format!("seed = 2\nspeed = {speed}"))
        .replace(
            "storage_dir = \"../demo-data\"",
            &format!("storage_dir = {:?}", dir.join("data").display().to_string()),
        )
        .replace(
            "token_file = \"demo-token\"",
            &format!(
                "token_file = {:?}",
                std::fs::canonicalize("config/demo-token")
                    .unwrap()
                    .display()
                    .to_string()
            ),
        )
        .replace(
            "alert = { limit = 0.05 }    # g envelope RMS",
            "alert = { limit = 0.0001 }",
        )
}
