#!/usr/bin/env python3
"""Side-by-side benchmark: csgate against what a practitioner would script in Python.

One seeded workload (fs = 25.6 kHz, n = 4096, hop 2048, m/n in {0.125, 0.25, 0.5}, a
machine-like signal: shaft harmonics, gear mesh with sidebands, bearing impacts ringing a
resonance, white noise) is solved, window after window with a warm start from the previous
window's solution, by:

  csgate         `csgate bench --solve-set` (FISTA with adaptive restart, DCT, f64, one core)
  csgate f32     the same in f32 working precision (the gateway's default)
  numpy FISTA    Beck & Teboulle FISTA on scipy.fft.dct/idct (norm='ortho') operators
  numpy FISTA+R  the same with the gradient adaptive restart of O'Donoghue & Candes (2015)
  pylops FISTA   pylops.optimization.sparsity.fista on Restriction * DCT^H
  sklearn Lasso  sklearn.linear_model.Lasso (coordinate descent) on the explicit matrix

all at the same lambda per window (0.01 ||A^T y||_inf, csgate's fixed starting weight). Every method
stops on its own rule, set to the same target: csgate and both numpy FISTAs at a relative duality
gap of 1e-4; scikit-learn at its dual-gap tolerance scaled to the same relative gap; pylops (which
has no gap test) after as many iterations as plain numpy FISTA needed from the same start (the
same algorithm, so the same iterates). Each result's objective is then checked against a
certified optimum: a long numpy FISTA run per window to a relative duality gap of 1e-9, whose
dual value D is a lower bound on the optimum F*, so (F - D) / D bounds the distance to F* from
above. "within 1e-3" counts the windows where that bound is at most 1e-3.

Runs are interleaved: for each round, every ratio, every method in turn; times are medians over
rounds and over the warm windows (window 0, a cold start, is not timed). SNR is of the
overlap-added signal (periodic Hann synthesis window, hop n/2, COLA) against the noise-free truth,
over the interior where every sample is covered by two windows. Linear interpolation of the same
samples is stitched the same way. Data go to csgate through files in a temporary folder (format in
bench/python/README.md).

Usage: side_by_side.py [--csgate PATH] [--windows 16] [--rounds 3] [--sklearn-windows 4]
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
import scipy.fft

FS = 25_600.0
N = 4096
HOP = 2048
RATIOS = (0.125, 0.25, 0.5)
LAMBDA_FRACTION = 0.01  # of lambda_max = ||A^T y||_inf, csgate's starting weight before tuning
GAP_TOL = 1e-4
CERT_TOL = 1e-9
TARGET = 1e-3
NOISE_RMS = 0.02


# ----------------------------------------------------------------------------------------------
# Workload


def machine_signal(samples, rng):
    """Noise-free truth of an invented gearbox: shaft harmonics, gear mesh (23 teeth) with two
    orders of sidebands, outer-race impacts ringing a 3.4 kHz resonance."""
    t = np.arange(samples) / FS
    shaft = 24.6
    x = np.zeros(samples)
    for order, amp, phase in ((1, 0.6, 0.0), (2, 0.2, 0.7), (3, 0.08, 1.3)):
        x += amp * np.cos(2 * np.pi * order * shaft * t + phase)
    gmf = 23 * shaft
    x += 1.5 * np.cos(2 * np.pi * gmf * t) + 0.5 * np.cos(2 * np.pi * 2 * gmf * t + 0.4)
    for order, amp in ((1, 0.4), (2, 0.12)):
        for sign in (-1, 1):
            x += amp * np.cos(2 * np.pi * (gmf + sign * order * shaft) * t + 0.3 * order)
    # BPFO = (z/2) f (1 - d/D cos a) for 9 elements, d = 7.94 mm, D = 39.04 mm, a = 0
    # (the bearing defect frequency formula, as in the simulator's machine model).
    bpfo = 4.5 * shaft * (1 - 7.94 / 39.04)
    decay_s = 0.6e-3
    ring = np.arange(int(8 * decay_s * FS)) / FS
    pulse = 3.0 * np.exp(-ring / decay_s) * np.sin(2 * np.pi * 3400.0 * ring)
    at = 0.0
    while at < samples / FS:
        k = int(round(at * FS))
        seg = pulse[: max(0, min(len(pulse), samples - k))]
        x[k : k + len(seg)] += seg
        at += (1.0 / bpfo) * (1.0 + 0.015 * rng.standard_normal())
    return x


def workload(windows, seed=20261202):
    rng = np.random.default_rng(seed)
    samples = (windows - 1) * HOP + N
    truth = machine_signal(samples, rng)
    measured = truth + NOISE_RMS * rng.standard_normal(samples)
    sets = {}
    for ratio in RATIOS:
        m = int(round(ratio * N))
        idx = np.empty((windows, m), dtype=np.uint32)
        y = np.empty((windows, m))
        for w in range(windows):
            i = np.sort(rng.choice(N, size=m, replace=False))
            idx[w] = i
            y[w] = measured[w * HOP + i]
        lam = np.array([LAMBDA_FRACTION * np.abs(adjoint(idx[w], y[w])).max() for w in range(windows)])
        sets[ratio] = (idx, y, lam)
    return truth, sets


# ----------------------------------------------------------------------------------------------
# Operators A = C Psi (Psi: orthonormal DCT-III synthesis), as csgate defines them


def apply(idx, s):
    return scipy.fft.idct(s, norm="ortho")[idx]


def adjoint(idx, r):
    z = np.zeros(N)
    z[idx] = r
    return scipy.fft.dct(z, norm="ortho")


def objective(idx, y, lam, s):
    r = apply(idx, s) - y
    return 0.5 * r @ r + lam * np.abs(s).sum()


def dual_value(idx, y, lam, s):
    """Dual value at the scaled residual of s (CHECK-VALUES 6.5): a lower bound on F*."""
    r = y - apply(idx, s)
    corr = np.abs(adjoint(idx, r)).max()
    nu = r * min(1.0, lam / corr) if corr > 0 else r
    return 0.5 * (y @ y) - 0.5 * ((y - nu) @ (y - nu))


# ----------------------------------------------------------------------------------------------
# Reference solvers


def fista_np(idx, y, lam, x0, tol, max_iter, restart):
    """FISTA (Beck & Teboulle 2009), step 1 (A has orthonormal rows), stopping on the relative
    duality gap; A y_k from the stored A x_k by linearity, so one dct and one idct per iteration,
    as csgate does."""
    x = x0.copy()
    z = apply(idx, x) if np.any(x) else np.zeros(len(y))
    x_prev, z_prev = x.copy(), z.copy()
    t, beta, ysq = 1.0, 0.0, y @ y
    k = 0
    for k in range(1, max_iter + 1):
        r = z + beta * (z - z_prev) - y
        g = adjoint(idx, r)
        corr = np.abs(g).max()
        d = y + (lam / corr if corr > lam else 1.0) * r
        dual = 0.5 * (ysq - d @ d)
        yk = x + beta * (x - x_prev)
        v = yk - g
        new = np.sign(v) * np.maximum(np.abs(v) - lam, 0.0)
        uphill = (yk - new) @ (new - x)
        x_prev, x = x, new
        z_prev, z = z, apply(idx, x)
        res = z - y
        obj = 0.5 * res @ res + lam * np.abs(x).sum()
        t_next = (1 + np.sqrt(1 + 4 * t * t)) / 2
        if restart and uphill > 0:
            t, beta = 1.0, 0.0
        else:
            beta, t = (t - 1) / t_next, t_next
        if max(obj - dual, 0.0) / max(obj, 1e-300) <= tol:
            break
    return x, k


def run_numpy(sets_r, restart, count):
    idx, y, lam = sets_r
    x = np.zeros(N)
    out = []
    for w in range(count):
        t0 = time.perf_counter()
        x, it = fista_np(idx[w], y[w], lam[w], x, GAP_TOL, 20000, restart)
        out.append((time.perf_counter() - t0, it, x.copy()))
    return out


def run_pylops(sets_r, niters, count):
    import pylops

    idx, y, lam = sets_r
    dct = pylops.signalprocessing.DCT(dims=N, dtype="float64")
    x = np.zeros(N)
    out = []
    for w in range(count):
        op = pylops.Restriction(N, idx[w].astype(np.int64), dtype="float64") @ dct.H
        t0 = time.perf_counter()
        # pylops minimises ||y - Op x||^2 + eps ||x||_1 (its docs): eps = 2 lambda; step 1.
        x, it, _ = pylops.optimization.sparsity.fista(
            op, y[w], x0=x, niter=int(niters[w]), eps=2 * lam[w], alpha=1.0, tol=0.0
        )
        out.append((time.perf_counter() - t0, it, np.asarray(x).copy()))
    return out


def run_sklearn(sets_r, psi, f_cert, count):
    from sklearn.linear_model import Lasso

    idx, y, lam = sets_r
    m = idx.shape[1]
    model = None
    prev = np.zeros(N)
    out = []
    for w in range(count):
        a = np.asfortranarray(psi[idx[w].astype(np.int64)])
        # scikit-learn minimises (1/(2m))||y - A s||^2 + alpha ||s||_1 and stops when its dual
        # gap is below tol ||y||^2 / m (its docs); scaled here to csgate's relative gap.
        tol = GAP_TOL * f_cert[w] / (y[w] @ y[w])
        model = Lasso(alpha=lam[w] / m, fit_intercept=False, warm_start=True, tol=tol,
                      max_iter=200000, selection="cyclic")
        model.coef_ = prev.copy()
        t0 = time.perf_counter()
        model.fit(a, y[w])
        out.append((time.perf_counter() - t0, int(model.n_iter_), model.coef_.copy()))
        prev = model.coef_.copy()
    return out


def run_csgate(binary, folder, ratio, sets_r, debias, tag, precision="f64"):
    idx, y, lam = sets_r
    count, m = idx.shape
    idx.astype("<u4").tofile(os.path.join(folder, f"idx_{tag}.u32"))
    y.astype("<f8").tofile(os.path.join(folder, f"y_{tag}.f64"))
    manifest = {
        "version": 1, "n": N, "m": m, "count": count, "lambdas": [float(v) for v in lam],
        "gap_tol": GAP_TOL, "max_iter": 20000, "warm_start": True, "debias": debias,
        "restart": True, "repeats": 1, "indices_file": f"idx_{tag}.u32",
        "values_file": f"y_{tag}.f64", "output": f"out_{tag}", "precision": precision,
    }
    path = os.path.join(folder, f"manifest_{tag}.json")
    with open(path, "w") as f:
        json.dump(manifest, f)
    subprocess.run([binary, "bench", "--solve-set", path, "--json"], check=True,
                   stdout=subprocess.DEVNULL)
    with open(os.path.join(folder, f"out_{tag}.json")) as f:
        res = json.load(f)
    coef = np.fromfile(os.path.join(folder, res["coefficients_file"]), dtype="<f8").reshape(count, N)
    return [(res["solve_us"][w] * 1e-6, res["iterations"][w], coef[w]) for w in range(count)]


# ----------------------------------------------------------------------------------------------
# Stitching and scoring


def stitch(windows_signal, count):
    """Overlap-add with the periodic Hann synthesis window at hop n/2 (sums to one: COLA)."""
    win = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(N) / N)
    out = np.zeros((count - 1) * HOP + N)
    for w, x in enumerate(windows_signal):
        out[w * HOP : w * HOP + N] += win * x
    return out


def snr_db(truth, est):
    a, b = HOP, len(est) - HOP  # interior: every sample covered by two windows
    e = truth[a:b] - est[a:b]
    return 10 * np.log10((truth[a:b] @ truth[a:b]) / (e @ e))


def certify(sets_r, count):
    idx, y, lam = sets_r
    x = np.zeros(N)
    lows, highs = [], []
    for w in range(count):
        x, _ = fista_np(idx[w], y[w], lam[w], x, CERT_TOL, 200000, True)
        highs.append(objective(idx[w], y[w], lam[w], x))
        lows.append(dual_value(idx[w], y[w], lam[w], x))
    return np.array(lows), np.array(highs)


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--csgate", default=os.path.join(here, "..", "..", "target", "release", "csgate"))
    ap.add_argument("--windows", type=int, default=16, help="windows per m/n (default 16)")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved rounds (default 3)")
    ap.add_argument("--sklearn-windows", type=int, default=4,
                    help="windows solved by scikit-learn (slow on the explicit matrix; default 4)")
    ap.add_argument("--json-out", help="also write every figure to this JSON file")
    args = ap.parse_args()
    if args.windows < 3:
        sys.exit("side_by_side: --windows must be at least 3 (two warm windows and a stitch)")
    if not os.access(args.csgate, os.X_OK):
        sys.exit(f"side_by_side: no csgate binary at {args.csgate} (cargo build --release first)")

    print(f"workload: fs {FS:.0f} Hz, n {N}, hop {HOP}, {args.windows} windows per m/n, "
          f"lambda {LAMBDA_FRACTION} lambda_max, gap tol {GAP_TOL:g}, {args.rounds} rounds")
    truth, sets = workload(args.windows)
    psi = scipy.fft.idct(np.eye(N), norm="ortho", axis=0)  # column j = Psi e_j
    methods = ["csgate", "csgate f32", "numpy FISTA", "numpy FISTA+R", "pylops FISTA", "sklearn Lasso"]
    results = {r: {k: [] for k in methods} for r in RATIOS}
    cert = {}
    extra = {}
    t_start = time.time()
    with tempfile.TemporaryDirectory(prefix="csgate-side-") as folder:
        for r in RATIOS:
            cert[r] = certify(sets[r], args.windows)
            extra[r] = run_csgate(args.csgate, folder, r, sets[r], True, f"{r}_debias")
        for rnd in range(args.rounds):
            for r in RATIOS:
                tag = f"{r}_{rnd}"
                results[r]["csgate"].append(run_csgate(args.csgate, folder, r, sets[r], False, tag))
                results[r]["csgate f32"].append(
                    run_csgate(args.csgate, folder, r, sets[r], False, tag + "_f32", "f32"))
                plain = run_numpy(sets[r], False, args.windows)
                results[r]["numpy FISTA"].append(plain)
                results[r]["numpy FISTA+R"].append(run_numpy(sets[r], True, args.windows))
                results[r]["pylops FISTA"].append(
                    run_pylops(sets[r], [p[1] for p in plain], args.windows))
                results[r]["sklearn Lasso"].append(
                    run_sklearn(sets[r], psi, cert[r][1], min(args.sklearn_windows, args.windows)))
                print(f"  round {rnd + 1}/{args.rounds} m/n {r}: done ({time.time() - t_start:.0f} s)",
                      flush=True)

    summary = {"n": N, "hop": HOP, "fs_hz": FS, "windows": args.windows, "rounds": args.rounds,
               "gap_tol": GAP_TOL, "target": TARGET, "ratios": {}}
    for r in RATIOS:
        idx, y, lam = sets[r]
        low, high = cert[r]
        print(f"\nm/n = {r} (m = {idx.shape[1]}); certified optimum: max relative gap "
              f"{np.max((high - low) / low):.1e}")
        print(f"  {'method':<26}{'ms/window':>10}{'x csgate':>10}{'iter':>7}{'us/iter':>9}"
              f"{'within 1e-3':>13}{'SNR dB':>8}")
        rows = {}
        base = None
        for name in methods:
            runs = results[r][name]
            count = len(runs[0])
            times = [runs[k][w][0] for k in range(len(runs)) for w in range(1, count)]
            iters = [runs[0][w][1] for w in range(1, count)]
            coefs = [runs[0][w][2] for w in range(count)]
            ok = sum((objective(idx[w], y[w], lam[w], coefs[w]) - low[w]) / low[w] <= TARGET
                     for w in range(count))
            ms = 1e3 * float(np.median(times))
            it = float(np.median(iters))
            base = ms if name == "csgate" else base
            snr = (snr_db(truth, stitch([scipy.fft.idct(c, norm="ortho") for c in coefs], count))
                   if count == args.windows else float("nan"))
            rows[name] = {"ms_per_window": ms, "iterations": it, "us_per_iteration": 1e3 * ms / max(it, 1),
                          "within_target": f"{ok}/{count}", "snr_db": snr, "windows": count}
            snr_s = f"{snr:8.2f}" if np.isfinite(snr) else f"{'-':>8}"
            print(f"  {name:<26}{ms:10.3f}{ms / base:10.1f}{it:7.0f}{1e3 * ms / max(it, 1):9.1f}"
                  f"{ok:>9}/{count:<3}{snr_s}")
        coefs = [c for (_, _, c) in extra[r]]
        snr_d = snr_db(truth, stitch([scipy.fft.idct(c, norm="ortho") for c in coefs], args.windows))
        lin = [np.interp(np.arange(N), idx[w], y[w]) for w in range(args.windows)]
        snr_l = snr_db(truth, stitch(lin, args.windows))
        print(f"  {'csgate debiased (replay)':<26}{'':>49}{snr_d:8.2f}")
        print(f"  {'linear interpolation':<26}{'':>49}{snr_l:8.2f}")
        rows["csgate debiased"] = {"snr_db": snr_d}
        rows["linear interpolation"] = {"snr_db": snr_l}
        summary["ratios"][str(r)] = rows
    print(f"\ntotal {time.time() - t_start:.0f} s. ms/window: median over warm windows and rounds, "
          "one core each; 'x csgate': time relative to csgate; sklearn: iterations are "
          "coordinate-descent epochs, on its first windows only.")
    if args.json_out:
        with open(args.json_out, "w") as f:
            json.dump(summary, f, indent=1)


if __name__ == "__main__":
    main()
