# The two commands a new user runs (see README.md):
#   make demo   -- installs what is missing, builds, runs csgate on the shipped demo data
#   make test   -- installs what is missing, runs every check and test
# Everything else here is a helper of those two.

CARGO ?= cargo
PY := .venv/bin/python

.PHONY: demo test setup setup-python build lint deny rust-test python-test bench bench-criterion

# The demo site's node 104 signs its frames; its key is in configs/demo-site.toml.
DEMO_KEY := 104=6b6579206f662051462d31303420666f722064656d6f

demo: setup
	$(CARGO) build --release --locked
	mkdir -p demo-out
	STAMP=$$(date -u +%Y%m%dT%H%M%SZ); \
	./target/release/csgate replay demo-data/demo-site.cslog --key $(DEMO_KEY) \
	  --machines configs/demo-site.toml \
	  --out demo-out/demo-site-$$STAMP.h5 --events demo-out/demo-site-$$STAMP.jsonl

test: setup-python lint deny rust-test python-test

setup:
	bash scripts/setup.sh

setup-python:
	bash scripts/setup.sh --python

lint:
	$(CARGO) fmt --all -- --check
	$(CARGO) clippy --locked --release --all-targets -- -D warnings

# Dependency policy (deny.toml) with cargo-deny, installed once from crates.io; the advisories
# check runs only when a RustSec database is present (scripts/deny.sh says which ran).
deny:
	bash scripts/deny.sh

rust-test:
	$(CARGO) test --locked --release

# `cargo test --no-run` and not `cargo build`: the binary the Rust tests built (with the
# dev-dependencies' features) is reused instead of compiling the crate a second time (5 min here).
python-test:
	$(CARGO) test --locked --release --no-run
	CSGATE_BIN=$(CURDIR)/target/release/csgate $(PY) -m pytest -q tests/python

# Side-by-side against numpy/scipy, pylops and scikit-learn (bench/python/), then this machine's
# real-time capacity (`csgate bench`). A few minutes; not part of `make test`. BENCHMARKS.md has
# the figures and the other benchmark commands.
bench: setup-python
	@if [ ! -f .venv/.bench-installed ] || [ bench/python/requirements.txt -nt .venv/.bench-installed ]; then \
	  echo "bench: installing the Python reference libraries (bench/python/requirements.txt)"; \
	  $(PY) -m pip install -q --disable-pip-version-check -r bench/python/requirements.txt && \
	  touch .venv/.bench-installed; fi
	$(CARGO) build --locked --release
	$(PY) bench/python/side_by_side.py --csgate ./target/release/csgate
	./target/release/csgate bench

# The criterion benches (benches/*.rs); longer.
bench-criterion:
	$(CARGO) bench --locked
