"""Cross-check of `csgate spectrum --json` against scipy.signal.welch and scipy.signal.find_peaks.

The signal is generated here with a seeded numpy generator and written as text, one value per
line (repr keeps every float64 exactly). The Rust side follows scipy's Welch definition
(periodic Hann, detrend='constant', one-sided density, mean over segments) and scipy's
prominence definition, so the PSD must agree to rounding (1e-9 relative) and the candidate peak
bins exactly.
"""
import json
import os
import subprocess

import numpy as np
from scipy.signal import find_peaks, welch

FS = 25600.0


def make_signal():
    rng = np.random.default_rng(20240601)
    n = 3 * 25600 // 2
    t = np.arange(n) / FS
    x = (np.sin(2 * np.pi * 29.95 * t)
         + 0.3 * np.sin(2 * np.pi * 59.9 * t + 0.5)
         + 0.05 * np.sin(2 * np.pi * 1234.56 * t + 1.0)
         + 0.01 * np.sin(2 * np.pi * 3333.3 * t)
         + rng.normal(0.0, 0.01, n)
         + 0.2)
    return x


def run_spectrum(tmp_path, x, *args):
    path = tmp_path / "signal.txt"
    path.write_text("value\n" + "\n".join(repr(float(v)) for v in x) + "\n")
    out = subprocess.run(
        [os.environ["CSGATE_BIN"], "spectrum", "--input", str(path), "--fs", repr(FS), "--json", *args],
        check=True, capture_output=True, text=True).stdout
    return json.loads(out)


def amplitude_db(psd, nperseg, dynamic_range_db):
    """The dB spectrum csgate searches: 20 log10 of the peak amplitude, from the density."""
    w = np.hanning(nperseg + 1)[:-1]  # periodic Hann, as scipy.signal.get_window('hann', n)
    power = psd * FS * np.sum(w ** 2) / np.sum(w) ** 2
    amp = np.sqrt(2.0 * power)
    amp[0] = np.sqrt(power[0])
    if nperseg % 2 == 0:
        amp[-1] = np.sqrt(power[-1])
    floor = amp.max() * 10 ** (-dynamic_range_db / 20)
    return 20 * np.log10(np.maximum(amp, floor))


def check(tmp_path, nperseg, noverlap, prominence, tones):
    x = make_signal()
    args = ["--nperseg", str(nperseg), "--prominence-db", repr(prominence)]
    if noverlap is not None:
        args += ["--noverlap", str(noverlap)]
    got = run_spectrum(tmp_path, x, *args)
    f, p = welch(x, fs=FS, window="hann", nperseg=nperseg, noverlap=noverlap,
                 detrend="constant", scaling="density")
    psd = np.array(got["psd"])
    assert psd.shape == p.shape
    assert got["bin_hz"] == f[1]
    np.testing.assert_allclose(psd, p, rtol=1e-9, atol=1e-9 * p.max() * 1e-6)
    db = amplitude_db(p, nperseg, got["dynamic_range_db"])
    np.testing.assert_allclose(np.array(got["amplitude_db"]), db, rtol=0, atol=1e-7)
    peaks, _ = find_peaks(db, prominence=prominence)
    assert got["candidate_bins"] == peaks.tolist()
    # The refined peaks include the resolved tones (those several bins from any other line).
    freqs = sorted(pk["freq_hz"] for pk in got["peaks"])
    for tone in tones:
        assert min(abs(fr - tone) for fr in freqs) < 0.05 * got["bin_hz"], (tone, freqs)


def test_psd_and_peaks_match_scipy_default_overlap(tmp_path):
    check(tmp_path, 4096, None, 10.0, (29.95, 59.9, 1234.56, 3333.3))


def test_psd_and_peaks_match_scipy_odd_overlap(tmp_path):
    # 12.5 Hz bins do not resolve 29.95 from 59.9 Hz (2.4 bins apart): check the others.
    check(tmp_path, 2048, 700, 15.0, (1234.56, 3333.3))
