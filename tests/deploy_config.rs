//! deploy/bandwatch.toml, the config the .deb installs as
//! /etc/bandwatch/bandwatch.toml, stays valid and stays what
//! docs/install.md says it is: a network source for a DAQ box (not the
//! demo's simulator), two accelerometer channels of pump train P2, HTTP on
//! loopback port 9750, a relative storage_dir (under systemd: the state
//! directory /var/lib/bandwatch) and the token file the postinst writes.

use std::path::Path;
use std::process::Command;

use bandwatch::config::SourceKind;

const DEPLOY: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/deploy/bandwatch.toml");

#[test]
fn the_default_config_passes_the_file_check() {
    // The binary's own `check`, as a technician runs it, on the file alone
    // (`--no-env`): the environment of a plant PC is not this machine's
    // (tests/external/deb.sh checks it installed, environment and all).
    let bin = env!("CARGO_BIN_EXE_bandwatch");
    let args = ["check", "--no-env", "--config", DEPLOY];
    let out = Command::new(bin)
        .args(args)
        .output()
        .expect("run bandwatch check");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "bandwatch {args:?}: {:?}\n{stdout}\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(stdout.contains("ok (1 source(s), 2 channel(s)"), "{stdout}");
}

#[test]
fn the_default_config_is_a_plant_starting_point() {
    let cfg = bandwatch::config::load(Path::new(DEPLOY)).expect("deploy/bandwatch.toml loads");
    assert_eq!(cfg.listen.to_string(), "127.0.0.1:9750");
    assert_eq!(cfg.sources.len(), 1);
    let source = &cfg.sources[0];
    assert!(
        matches!(
            source.kind,
            SourceKind::TcpListen { .. } | SourceKind::Udp { .. }
        ),
        "the default source must listen for a DAQ box: {:?}",
        source.kind
    );
    assert_eq!(cfg.channels.len(), 2);
    for c in &cfg.channels {
        assert!(c.name.starts_with("p2-"), "{}", c.name);
        assert_eq!(c.source, source.name);
    }
    assert!(cfg.alarms.is_some(), "[alarms] with storage and token");

    // The raw file: paths as the package and the unit expect them.
    let text = std::fs::read_to_string(DEPLOY).expect("read deploy/bandwatch.toml");
    assert!(!text.contains("kind = \"sim\""), "not the demo's simulator");
    let raw: toml::Table = text.parse().expect("TOML");
    let alarms = raw
        .get("alarms")
        .and_then(|a| a.as_table())
        .expect("[alarms]");
    let storage = alarms
        .get("storage_dir")
        .and_then(|s| s.as_str())
        .expect("storage_dir");
    assert!(
        Path::new(storage).is_relative(),
        "storage_dir must be relative (-> $STATE_DIRECTORY): {storage}"
    );
    assert_eq!(
        alarms.get("token_file").and_then(|s| s.as_str()),
        Some("/etc/bandwatch/token"),
        "the file the postinst writes"
    );
}
