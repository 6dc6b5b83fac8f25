#!/usr/bin/env bash
# Builds the .deb: the one documented command (docs/install.md).
#
#   bash deploy/build-deb.sh            # -> target/debian/bandwatch_<version>-1_<arch>.deb
#
# 1. the release binary (`cargo build --release --locked`);
# 2. shell completions (bash, zsh, fish) and man pages from that binary's
#    own CLI definition, into target/assets/ (man pages gzipped, as Debian
#    wants them);
# 3. `cargo deb --no-build --strip`: packs the stripped binary, the unit,
#    the config, the docs and target/assets/ as Cargo.toml's
#    [package.metadata.deb] lists them.
#
# Needs cargo-deb at the version below (`cargo install --locked cargo-deb
# --version 3.8.0`), dpkg-dev (dpkg-shlibdeps, for the $auto dependencies)
# and binutils (strip). Prints the path of the .deb on its last line.
set -euo pipefail
cd "$(dirname "$0")/.."

cargo_deb_version="3.8.0"
if ! cargo deb --version 2>/dev/null | grep -F "$cargo_deb_version" >/dev/null; then
    echo "build-deb: needs cargo-deb $cargo_deb_version:" \
        "cargo install --locked cargo-deb --version $cargo_deb_version" >&2
    exit 1
fi

target_dir="${CARGO_TARGET_DIR:-target}"
if [ "$target_dir" != "target" ]; then
    # Cargo.toml's asset paths name target/assets and target/release.
    echo "build-deb: CARGO_TARGET_DIR must be unset (or 'target')" >&2
    exit 1
fi

cargo build --release --locked
bin="target/release/bandwatch"

assets="target/assets"
rm -rf "$assets"
mkdir -p "$assets/completions" "$assets/man"
"$bin" completions bash > "$assets/completions/bandwatch"
"$bin" completions zsh > "$assets/completions/_bandwatch"
"$bin" completions fish > "$assets/completions/bandwatch.fish"
"$bin" man --out-dir "$assets/man"
# -n: no name or time stamp in the gzip header, so the .deb is reproducible.
gzip -9 -n -f "$assets"/man/*.1

cargo deb --no-build --strip | tail -n 1
