"""End to end with h5py: simulate the demo site with ground truth, replay the log with csgate,
and read the record as any analysis tool would.

Checks the paths and attributes docs/hdf5-layout.md documents for a replayed record, and that
the reconstruction beats linear interpolation of the same samples (csgate replay --method
linear, the same windows and stitching) on every machine-vibration stream, both scored here
with numpy against the truth (SNR 10 log10(sum x^2 / sum (x - x_hat)^2), common practice).
"""
import os
import subprocess
from pathlib import Path

import h5py
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]
BIN = os.environ["CSGATE_BIN"]
DEMO_KEY = "104=6b6579206f662051462d31303420666f722064656d6f"  # configs/demo-site.toml
VIBRATION = [(101, 0), (102, 0), (103, 0), (104, 0)]


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    d = tmp_path_factory.mktemp("replay")
    log, truth, rec, lin = d / "site.cslog", d / "truth.h5", d / "record.h5", d / "linear.h5"
    subprocess.run([BIN, "simulate", "--scenario", str(ROOT / "configs/demo-site.toml"),
                    "--out", str(log), "--truth", str(truth), "--duration", "4", "--quiet"],
                   check=True)
    subprocess.run([BIN, "replay", str(log), "--key", DEMO_KEY, "--out", str(rec), "--quiet"],
                   check=True, capture_output=True)
    subprocess.run([BIN, "replay", str(log), "--key", DEMO_KEY, "--method", "linear",
                    "--out", str(lin), "--quiet"], check=True, capture_output=True)
    return lin, truth, rec


def snr_db(x, ref):
    return 10 * np.log10(np.sum(ref ** 2) / np.sum((x - ref) ** 2))


def test_record_has_documented_paths(run):
    _, _, rec = run
    with h5py.File(rec, "r", libver="latest", swmr=True) as f:
        assert f.attrs["layout_version"] == 1
        for name in ("tool_version", "config_digest", "created"):
            assert name in f.attrs
        for node, ch in VIBRATION + [(101, 1), (103, 1)]:
            g = f[f"/streams/{node}/{ch}"]
            s = g["samples"]
            assert s.dtype == np.float32 and s.ndim == 1 and s.maxshape == (None,)
            for a in ("sample_rate_hz", "start_time", "start_time_unix_ns", "units", "basis",
                      "node", "channel"):
                assert a in s.attrs, a
            assert s.attrs["sample_rate_hz"] == 25600.0
            assert int(s.attrs["node"]) == node and int(s.attrs["channel"]) == ch
            for ds in ("windows", "gaps", "segments", "peaks", "indicators"):
                assert ds in g, ds
            assert len(g["windows"]) > 0 and len(g["gaps"]) == 0


def read_aligned(f, t, node, ch):
    s = f[f"/streams/{node}/{ch}/samples"]
    ts = t[f"/streams/{node}/{ch}/samples"]
    off = round((int(s.attrs["start_time_unix_ns"]) - int(ts.attrs["start_time_unix_ns"]))
                * float(s.attrs["sample_rate_hz"]) / 1e9)
    x = s[:].astype(np.float64)
    return x, ts[off:off + len(x)].astype(np.float64)


def test_record_matches_truth_better_than_interpolation(run):
    lin, truth, rec = run
    with h5py.File(rec, "r", libver="latest", swmr=True) as f, \
            h5py.File(lin, "r", libver="latest", swmr=True) as g, \
            h5py.File(truth, "r", libver="latest", swmr=True) as t:
        for node, ch in VIBRATION:
            x, ref = read_aligned(f, t, node, ch)
            xl, refl = read_aligned(g, t, node, ch)
            assert np.all(np.isfinite(x))
            ours, theirs = snr_db(x, ref), snr_db(xl, refl)
            print(f"stream {node}/{ch}: record {ours:.2f} dB, linear interpolation {theirs:.2f} dB")
            assert ours > theirs, (node, ch, ours, theirs)
