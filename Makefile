# The two commands a new user runs (see README.md):
#   make demo   -- installs what is missing, builds, runs csgate on the shipped demo data
#   make test   -- installs what is missing, runs every check and test
# Everything else here is a helper of those two.

CARGO ?= cargo
PY := .venv/bin/python

.PHONY: demo test setup setup-python build lint rust-test python-test bench

demo: setup
	$(CARGO) build --release --locked
	./target/release/csgate demo

test: setup-python lint rust-test python-test

setup:
	bash scripts/setup.sh

setup-python:
	bash scripts/setup.sh --python

lint:
	$(CARGO) fmt --all -- --check
	$(CARGO) clippy --locked --release --all-targets -- -D warnings

rust-test:
	$(CARGO) test --locked --release

python-test:
	$(CARGO) build --locked --release
	CSGATE_BIN=$(CURDIR)/target/release/csgate $(PY) -m pytest -q tests/python

bench: setup-python
	$(CARGO) bench --locked
