"""Cross-check of `csgate solve` against scikit-learn's coordinate-descent LASSO.

The sampled operator is built explicitly: A = rows `indices` of the orthonormal inverse DCT
matrix, i.e. scipy.fft.idct of the identity with norm='ortho' (DCT-III, the transpose of the
orthonormal DCT-II). scikit-learn's Lasso minimizes (1/(2m))||y - Xw||^2 + alpha ||w||_1, so
alpha = lambda / m gives the same minimizer as 0.5||y - A s||^2 + lambda ||s||_1
(scikit-learn documentation of sklearn.linear_model.Lasso; worked example in the project's
check values, section 6.8). Its default tol is loose, so it is tightened.
"""
import json
import os
import subprocess

import numpy as np
import pytest
import scipy.fft
from sklearn.linear_model import Lasso


def objective(a, y, s, lam):
    return 0.5 * np.sum((a @ s - y) ** 2) + lam * np.sum(np.abs(s))


def run_csgate(tmp_path, problem):
    inp = tmp_path / "problem.json"
    out = tmp_path / "solution.json"
    inp.write_text(json.dumps(problem))
    subprocess.run([os.environ["CSGATE_BIN"], "solve", "--input", str(inp),
                    "--output", str(out)], check=True)
    return json.loads(out.read_text())


@pytest.mark.parametrize("seed,n,m,k,frac", [(1, 128, 40, 5, 0.1), (2, 256, 64, 8, 0.05),
                                             (3, 256, 128, 20, 0.02)])
def test_lasso_objective_matches_scikit_learn(tmp_path, seed, n, m, k, frac):
    rng = np.random.default_rng(seed)
    psi = scipy.fft.idct(np.eye(n), norm="ortho", axis=0)  # column j = synthesis of e_j
    idx = np.sort(rng.choice(n, size=m, replace=False))
    a = psi[idx, :]
    s0 = np.zeros(n)
    s0[rng.choice(n, size=k, replace=False)] = rng.standard_normal(k)
    y = a @ s0 + 0.01 * rng.standard_normal(m)
    lam = frac * np.max(np.abs(a.T @ y))  # fraction of lambda_max = ||A^T y||_inf

    result = run_csgate(tmp_path, {
        "n": n, "basis": "dct", "indices": idx.tolist(), "values": y.tolist(),
        "settings": {"form": {"lasso": {"lambda": {"absolute": lam}}},
                     "gap_tol": 1e-10, "max_iter": 200000, "debias": False},
    })
    s_cs = np.array(result["coefficients"])
    f_cs = objective(a, y, s_cs, lam)
    # csgate's own objective uses its fast DCT; it must agree with the explicit matrix.
    assert abs(result["report"]["objective"] - f_cs) <= 1e-8 * f_cs
    assert result["report"]["converged"]

    ref = Lasso(alpha=lam / m, fit_intercept=False, tol=1e-12, max_iter=10**6).fit(a, y)
    f_ref = objective(a, y, ref.coef_, lam)
    assert abs(f_cs - f_ref) <= 1e-4 * f_ref, (f_cs, f_ref)
    # The signal is the synthesis of the returned coefficients on the full grid.
    assert np.allclose(result["signal"], psi @ s_cs, atol=1e-10)
