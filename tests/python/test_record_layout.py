"""Checks the HDF5 record layout with h5py, independently of the Rust reader.

Every path, dtype and attribute asserted here is the one docs/hdf5-layout.md states. The records
come from the `record_fixture` example (built here with cargo next to the binary in CSGATE_BIN if
it is not there yet):
  - `record_fixture layout FILE` writes a fixed record (contents listed in test_samples_*);
  - `record_fixture crash FILE` writes and flushes until killed; the test kills it with SIGKILL.
Sample values are (i % 1000) * 0.25 - 100, exact in float32.
"""
import os
import re
import signal
import subprocess
from pathlib import Path

import h5py
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]
T0 = 1_796_126_400_000_000_000  # 2026-12-01T12:00:00Z


def pattern(i):
    return ((np.asarray(i, dtype=np.int64) % 1000) * 0.25 - 100.0).astype(np.float32)


@pytest.fixture(scope="session")
def fixture_bin():
    csgate = Path(os.environ["CSGATE_BIN"])
    exe = csgate.parent / "examples" / "record_fixture"
    if not exe.exists():
        cmd = ["cargo", "build", "--example", "record_fixture"]
        if csgate.parent.name == "release":
            cmd.insert(2, "--release")
        subprocess.run(cmd, cwd=ROOT, check=True)
    return exe


@pytest.fixture(scope="session")
def record(fixture_bin, tmp_path_factory):
    path = tmp_path_factory.mktemp("layout") / "fixture.h5"
    subprocess.run([str(fixture_bin), "layout", str(path)], check=True)
    with h5py.File(path, "r", libver="latest", swmr=True) as f:
        yield f


def fields(ds):
    """Field name -> numpy dtype string, in file order."""
    return [(name, ds.dtype.fields[name][0].str) for name in ds.dtype.names]


WINDOW_FIELDS = [
    ("seq", "<u8"), ("capture_id", "<u4"), ("start_sample", "<u8"), ("t0_unix_ns", "<i8"),
    ("m", "<u4"), ("n", "<u4"), ("lambda", "<f8"), ("iterations", "<u4"),
    ("duality_gap", "<f8"), ("residual", "<f8"), ("support", "<u4"), ("stop_reason", "|u1"),
    ("solve_time_us", "<f8"), ("cv_error", "<f8"), ("trust", "|u1"),
]
GAP_FIELDS = [("start_sample", "<u8"), ("length", "<u8"), ("reason", "|u1")]
SEGMENT_FIELDS = [("start_sample", "<u8"), ("capture_id", "<u4"), ("t0_unix_ns", "<i8")]
PEAK_FIELDS = [
    ("t_unix_ns", "<i8"), ("freq_hz", "<f8"), ("amplitude", "<f8"), ("prominence_db", "<f8"),
    ("label", "|S16"), ("order", "<i4"), ("source", "|u1"),
]
INDICATOR_FIELDS = [
    ("t_unix_ns", "<i8"), ("start_sample", "<u8"), ("len", "<u8"), ("rms", "<f8"),
    ("peak", "<f8"), ("crest", "<f8"), ("kurtosis", "<f8"), ("velocity_rms_mm_s", "<f8"),
    ("zone", "|u1"), ("low_trust", "|u1"),
]
ISO = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z$")


def test_file_attributes(record):
    a = record.attrs
    assert a["layout_version"] == 1 and a["layout_version"].dtype == np.uint32
    assert isinstance(a["tool_version"], str) and re.match(r"^\d+\.\d+\.\d+", a["tool_version"])
    assert a["config_digest"] == "0123abcd"
    assert ISO.match(a["created"])
    closed = record["closed"]
    assert fields(closed) == [("t_unix_ns", "<i8"), ("reason", "|u1")]
    assert closed.shape == (1,) and closed[0]["reason"] == 1  # 1 = shutdown


def test_stream_paths(record):
    assert sorted(record["streams"].keys()) == ["12", "3"]
    assert list(record["streams/3"].keys()) == ["1"]
    assert list(record["streams/12"].keys()) == ["0"]
    for path in ["/streams/3/1", "/streams/12/0"]:
        names = set(record[path].keys())
        assert names == {"samples", "windows", "gaps", "segments", "peaks", "indicators"}


@pytest.mark.parametrize("path,basis", [("/streams/3/1", "dct"), ("/streams/12/0", "truth")])
def test_samples_dataset_and_attributes(record, path, basis):
    s = record[path + "/samples"]
    assert s.dtype == np.float32 and s.ndim == 1
    assert s.maxshape == (None,)
    assert s.chunks == (65536,)
    a = s.attrs
    assert a["sample_rate_hz"] == 25600.0 and a["sample_rate_hz"].dtype == np.float64
    assert a["start_time"] == "2026-12-01T12:00:00.000000Z"
    assert a["start_time_unix_ns"] == T0 and a["start_time_unix_ns"].dtype == np.int64
    assert a["units"] == "m/s^2"
    assert a["basis"] == basis
    node, channel = (int(x) for x in path.split("/")[2:4])
    assert a["node"] == node and a["node"].dtype == np.uint32
    assert a["channel"] == channel and a["channel"].dtype == np.uint16
    assert s.compression == "gzip" and s.shuffle


def test_row_datasets_dtypes(record):
    for path in ["/streams/3/1", "/streams/12/0"]:
        for name, expected in [("windows", WINDOW_FIELDS), ("gaps", GAP_FIELDS),
                               ("segments", SEGMENT_FIELDS), ("peaks", PEAK_FIELDS),
                               ("indicators", INDICATOR_FIELDS)]:
            ds = record[f"{path}/{name}"]
            assert fields(ds) == expected, f"{path}/{name}"
            assert ds.ndim == 1 and ds.maxshape == (None,)


def test_samples_equal_what_was_written(record):
    s = record["/streams/3/1/samples"][...]
    assert s.shape == (3500,)
    i = np.arange(3500)
    written = (i < 1000) | ((i >= 1100) & (i < 3000))
    np.testing.assert_array_equal(s[written], pattern(i[written]))
    assert np.isnan(s[1000:1100]).all()
    # After the capture restart, grid positions 0..500 of capture 8 were written from 3000.
    np.testing.assert_array_equal(s[3000:], pattern(np.arange(3000, 3500)))
    truth = record["/streams/12/0/samples"][...]
    np.testing.assert_array_equal(truth, pattern(np.arange(2000)))


def test_gap_segment_window_rows(record):
    g = record["/streams/3/1/gaps"][...]
    assert g.tolist() == [(1000, 100, 1)]  # 1 = window missing
    seg = record["/streams/3/1/segments"][...]
    assert seg.tolist() == [(0, 7, T0), (3000, 8, T0 + 10_000_000_000)]
    w = record["/streams/3/1/windows"][...]
    assert w["seq"].tolist() == [0, 1, 3]
    assert w["start_sample"].tolist() == [0, 512, 1536]
    assert np.isnan(w["cv_error"]).all() and (w["trust"] == 0).all()
    assert record["/streams/12/0/windows"].shape == (0,)
    assert record["/streams/12/0/segments"][...].tolist() == [(0, 7, T0)]


def test_time_rule_from_segments(record):
    """t(k) = t0 + round((k - start_sample) * 1e9 / sample_rate_hz) of the last segment <= k."""
    seg = record["/streams/3/1/segments"][...]
    rate = record["/streams/3/1/samples"].attrs["sample_rate_hz"]

    def t(k):
        row = seg[seg["start_sample"] <= k][-1]
        return int(row["t0_unix_ns"]) + round((k - int(row["start_sample"])) * 1e9 / rate)

    assert t(256) == T0 + 10_000_000
    assert t(3256) == T0 + 10_000_000_000 + 10_000_000


def test_peaks_and_indicators(record):
    p = record["/streams/3/1/peaks"][...]
    assert p.shape == (1,)
    assert p[0]["label"] == b"BPFO" and p[0]["source"] == 1 and p[0]["freq_hz"] == 157.25
    ind = record["/streams/3/1/indicators"][...]
    assert ind.shape == (1,) and ind[0]["zone"] == 2 and ind[0]["len"] == 1000


def test_sigkill_leaves_a_file_h5py_opens(fixture_bin, tmp_path):
    path = tmp_path / "crash.h5"
    child = subprocess.Popen([str(fixture_bin), "crash", str(path)], stdout=subprocess.PIPE,
                             text=True)
    flushed = 0
    target = 5 + os.getpid() % 13
    for line in child.stdout:
        if line.startswith("flushed "):
            flushed = int(line.split()[1])
            if flushed >= target:
                break
    child.send_signal(signal.SIGKILL)
    child.wait()
    assert child.returncode == -signal.SIGKILL
    with h5py.File(path, "r", libver="latest", swmr=True) as f:
        s = f["/streams/5/2/samples"][...]
        w = f["/streams/5/2/windows"][...]
        assert len(w) >= flushed
        assert w["seq"].tolist() == list(range(len(w)))
        assert len(s) >= flushed * 4096
        np.testing.assert_array_equal(s, pattern(np.arange(len(s))))
        assert f["closed"].shape == (0,)
