#!/usr/bin/env bash
# Dependency checks with cargo-deny (policy in deny.toml), part of `make test`.
#   - Installs cargo-deny from crates.io once (`cargo install --locked`, about 2 minutes on
#     2 cores; skipped when the pinned version is already installed).
#   - Always runs `cargo deny check bans licenses sources`: duplicate and wildcard versions,
#     licences against the allow list, crates.io as the only source. No network needed; a
#     failure fails the build.
#   - Runs `cargo deny check advisories` only when a RustSec advisory database is present at
#     target/advisory-db (deny.toml `db-path`). The database is published as a git repository,
#     which this project's machines and CI cannot reach, and no package registry they reach
#     ships it; without it this script says so plainly and does not fail.
set -euo pipefail
cd "$(dirname "$0")/.."

DENY_VERSION=0.20.2
if ! cargo deny --version 2>/dev/null | grep -qx "cargo-deny $DENY_VERSION"; then
  echo "deny: installing cargo-deny $DENY_VERSION from crates.io (once; a few minutes)"
  cargo install --locked --quiet cargo-deny --version "$DENY_VERSION"
fi

# `--offline` needs every crate of the lock file (all targets) in the local registry cache.
cargo fetch --locked --quiet
cargo deny --offline check bans licenses sources

if [ -d target/advisory-db ] && [ -n "$(ls -A target/advisory-db 2>/dev/null)" ]; then
  cargo deny --offline check advisories
else
  echo "deny: advisories NOT checked: no RustSec advisory database at target/advisory-db" \
       "(it is fetched from a git host this machine cannot reach); bans, licenses and sources passed"
fi
