"""Plain numpy / scipy / scikit-learn versions of the fits timed by benches/fit_speed.rs.

Usage: python3 benches/fit_speed.py CASE DIR   (CASE: temperature, isotonic or vector)

Reads DIR/CASE_logits.npy and DIR/CASE_labels.npy, times np.load and the fit separately, and
prints one JSON line: load and fit seconds, peak resident memory (ru_maxrss) and the fitted
values the Rust side prints too, so the two fits can be compared.

- temperature: scipy.optimize.minimize_scalar (bounded, log T in [-10, 10], xatol = 64 eps, the
  call scikit-learn's temperature calibrator makes) of the mean NLL
  mean(logsumexp(z / T, axis=1) - z_y / T), computed by numpy on the loaded float32 array.
- isotonic: IsotonicRegression(out_of_bounds="clip").fit(expit(f), y) on the one-column log-odds f
  (candor fits the same probabilities sigma(f)).
- vector: scipy.optimize.minimize(method="L-BFGS-B") of the mean NLL of softmax(w * z + b) with
  its analytic gradient, from w = 1, b = 0, gtol = 1e-8 (candor's gradient tolerance).
"""

import json
import resource
import sys
import time

import numpy as np
from scipy.optimize import minimize, minimize_scalar
from scipy.special import expit, logsumexp


def load(directory, case):
    start = time.perf_counter()
    z = np.load(f"{directory}/{case}_logits.npy")
    y = np.load(f"{directory}/{case}_labels.npy")
    return z, y, time.perf_counter() - start


def temperature(z, y):
    n = z.shape[0]
    zy = z[np.arange(n), y]
    calls = [0]

    def nll(log_t):
        calls[0] += 1
        t = np.exp(log_t)
        return float(np.mean(logsumexp(z / t, axis=1) - zy / t, dtype=np.float64))

    res = minimize_scalar(
        nll, bounds=(-10.0, 10.0), method="bounded",
        options={"xatol": 64 * np.finfo(float).eps},
    )
    t = float(np.exp(res.x))
    return {"temperature": t, "nll_start": nll(0.0), "nll_end": float(res.fun),
            "evaluations": calls[0] - 1}


PROBES = [0.05, 0.2, 0.4, 0.5, 0.6, 0.8, 0.95]


def isotonic(f, y):
    from sklearn.isotonic import IsotonicRegression

    iso = IsotonicRegression(out_of_bounds="clip").fit(expit(f), y)
    return {"knots": int(len(iso.X_thresholds_)),
            "probes": [float(v) for v in iso.predict(PROBES)]}


def vector(z, y):
    n, k = z.shape
    onehot_rows = np.arange(n)

    def objective(theta):
        w, b = theta[:k], theta[k:]
        u = z * w + b
        lse = logsumexp(u, axis=1)
        loss = np.mean(lse - u[onehot_rows, y])
        r = np.exp(u - lse[:, None])
        r[onehot_rows, y] -= 1.0
        grad_w = np.einsum("ik,ik->k", r, z) / n
        grad_b = r.sum(axis=0) / n
        return loss, np.concatenate([grad_w, grad_b])

    theta0 = np.concatenate([np.ones(k), np.zeros(k)])
    start = objective(theta0)[0]
    res = minimize(objective, theta0, jac=True, method="L-BFGS-B",
                   options={"gtol": 1e-8, "ftol": 1e-15, "maxiter": 10000})
    return {"nll_start": float(start), "nll_end": float(res.fun),
            "iterations": int(res.nit), "evaluations": int(res.nfev)}


def main():
    case, directory = sys.argv[1], sys.argv[2]
    z, y, load_secs = load(directory, case)
    fit = {"temperature": temperature, "isotonic": isotonic, "vector": vector}[case]
    start = time.perf_counter()
    result = fit(z, y)
    fit_secs = time.perf_counter() - start
    from threadpoolctl import threadpool_info

    blas = [f"{i.get('internal_api')} {i.get('architecture')} x{i.get('num_threads')}"
            for i in threadpool_info()]
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"read_secs": load_secs, "fit_secs": fit_secs, "peak_bytes": peak,
                      "result": result, "blas": blas}))


if __name__ == "__main__":
    main()
