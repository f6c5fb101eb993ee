#!/usr/bin/env bash
# Installs what csgate needs on a fresh Debian/Ubuntu machine, and only what is missing:
#   - the system HDF5 library (libhdf5-dev, pkg-config; hdf5-tools for h5clear/h5dump);
#   - the NATS server (nats-server, JetStream) and the MQTT broker (mosquitto) that the broker
#     tests start on loopback themselves (Debian starts no service of its own in a container;
#     where it does, the tests use ports of their own);
#   - with --python: a local virtual environment .venv with the Python reference libraries
#     the tests compare against (tests/python/requirements.txt).
# Safe to run again; it does nothing when everything is present.
set -euo pipefail
cd "$(dirname "$0")/.."

want_python=0
for a in "$@"; do
  case "$a" in
    --python) want_python=1 ;;
    *) echo "setup.sh: unknown option $a" >&2; exit 2 ;;
  esac
done

as_root() {
  if [ "$(id -u)" -eq 0 ]; then "$@"; elif command -v sudo >/dev/null; then sudo "$@"; else
    echo "setup.sh: need root to run: $*" >&2; exit 1; fi
}

if ! command -v pkg-config >/dev/null 2>&1 || ! pkg-config --exists hdf5 || ! command -v h5clear >/dev/null 2>&1; then
  echo "setup: installing the system HDF5 library (libhdf5-dev, pkg-config, hdf5-tools)"
  as_root apt-get update -qq
  DEBIAN_FRONTEND=noninteractive as_root apt-get install -y -qq --no-install-recommends \
    libhdf5-dev pkg-config hdf5-tools >/dev/null
fi

has() { command -v "$1" >/dev/null 2>&1 || [ -x "/usr/sbin/$1" ]; }
missing=()
has nats-server || missing+=(nats-server)
has mosquitto || missing+=(mosquitto)
if [ "${#missing[@]}" -gt 0 ]; then
  echo "setup: installing the broker servers for the tests (${missing[*]})"
  as_root apt-get update -qq
  DEBIAN_FRONTEND=noninteractive as_root apt-get install -y -qq --no-install-recommends \
    "${missing[@]}" >/dev/null
fi

if [ "$want_python" -eq 1 ]; then
  req=tests/python/requirements.txt
  stamp=.venv/.installed
  if [ ! -x .venv/bin/python ]; then
    echo "setup: creating the Python venv .venv"
    python3 -m venv .venv
  fi
  if [ ! -f "$stamp" ] || [ "$req" -nt "$stamp" ]; then
    echo "setup: installing Python reference libraries into .venv ($(tr '\n' ' ' < "$req"))"
    .venv/bin/python -m pip install -q --disable-pip-version-check -r "$req"
    touch "$stamp"
  fi
fi
