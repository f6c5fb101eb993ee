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
    subprocess.run([BIN, "replay", str(log), "--key", DEMO_KEY, "--out", str(rec), "--quiet",
                    "--machines", str(ROOT / "configs/demo-site.toml"),
                    "--events", str(d / "events.jsonl")],
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


PEAK_FIELDS = [
    ("t_unix_ns", "<i8"), ("freq_hz", "<f8"), ("amplitude", "<f8"), ("prominence_db", "<f8"),
    ("label", "|S16"), ("order", "<i4"), ("source", "|u1"),
]
INDICATOR_FIELDS = [
    ("t_unix_ns", "<i8"), ("start_sample", "<u8"), ("len", "<u8"), ("rms", "<f8"),
    ("peak", "<f8"), ("crest", "<f8"), ("kurtosis", "<f8"), ("velocity_rms_mm_s", "<f8"),
    ("zone", "|u1"), ("low_trust", "|u1"),
]


def fields(ds):
    return [(name, ds.dtype.fields[name][0].str) for name in ds.dtype.names]


def test_analytics_rows_trust_and_events(run):
    """docs/hdf5-layout.md (peaks, indicators, trust figures) and docs/events.md."""
    import json
    _, _, rec = run
    with h5py.File(rec, "r", libver="latest", swmr=True) as f:
        for node, ch in VIBRATION + [(101, 1), (103, 1)]:
            g = f[f"/streams/{node}/{ch}"]
            assert fields(g["peaks"]) == PEAK_FIELDS and fields(g["indicators"]) == INDICATOR_FIELDS
            ind, peaks, w = g["indicators"][...], g["peaks"][...], g["windows"][...]
            rate = g["samples"].attrs["sample_rate_hz"]
            # 4 s at 25.6 kHz in blocks of 13 hops of 2048 (1.04 s): 3 complete blocks.
            assert len(ind) == 3 and (ind["len"] == 13 * 2048).all()
            assert (ind["start_sample"] == np.arange(3) * 13 * 2048).all()
            assert set(peaks["t_unix_ns"]) == set(ind["t_unix_ns"])
            assert set(np.unique(peaks["source"])) <= {0, 1}
            assert np.isfinite(w["cv_error"]).all() and set(np.unique(w["trust"])) <= {1, 2}
            low_windows = w["trust"] == 2
            assert (ind["low_trust"] <= 1).all()
            if not low_windows.any():
                assert (ind["low_trust"] == 0).all()
            if g["samples"].attrs["units"] == "Pa":
                assert np.isnan(ind["velocity_rms_mm_s"]).all() and (ind["zone"] == 0).all()
            else:
                assert np.isfinite(ind["velocity_rms_mm_s"]).all() and (ind["zone"] >= 1).all()
            del rate
        # Node 102 has an outer-race spall (configs/demo-site.toml): BPFO in its envelope.
        p = f["/streams/102/0/peaks"][...]
        env = p[p["source"] == 1]
        assert b"BPFO" in set(env["label"]), env["label"]
    lines = (rec.parent / "events.jsonl").read_text().splitlines()
    assert len(lines) == 6 * 3
    for line in lines:
        e = json.loads(line)
        assert e["version"] == 1 and "qualified analyst" in e["caution"]
        assert {"indicators", "peaks", "envelope_peaks", "trust", "zone", "units"} <= set(e)
