"""Smoke check that the binary runs; the reference checks live beside it."""
import os
import subprocess


def test_binary_runs():
    out = subprocess.run([os.environ["CSGATE_BIN"], "--version"], check=True,
                         capture_output=True, text=True).stdout
    assert out.startswith("csgate ")
