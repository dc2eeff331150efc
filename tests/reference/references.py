"""Reference computations for candor's conformance fixtures (see make_fixtures.py).

Each function transcribes a formula of METHODS.md with numpy/scipy or calls the scikit-learn
estimator named in its docstring. Inputs are the rounded values that are written to the fixture,
so the Rust side and these references see identical numbers.
"""

import numpy as np
from scipy import optimize, special
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.calibration import CalibratedClassifierCV, _sigmoid_calibration
from sklearn.frozen import FrozenEstimator
from sklearn.isotonic import IsotonicRegression
from sklearn.metrics import accuracy_score, brier_score_loss, log_loss

# Bounds of ln β searched for temperature scaling: T ∈ [e^-10, e^10] (METHODS.md 2.1, the bounds
# scikit-learn's temperature calibrator uses).
LOG_BETA_BOUNDS = (-10.0, 10.0)
# Absolute x tolerance passed to the bounded Brent search; scipy adds sqrt(eps)·|x| itself.
TEMPERATURE_XATOL = 1e-12
# Stopping rule of the L-BFGS-B start of the vector-scaling reference (mean-NLL scale), and the
# relative step tolerance of the root polish that follows.
VECTOR_GTOL = 1e-12
VECTOR_ROOT_XTOL = 1e-15
VECTOR_MAXITER = 100_000
# The stopping rule of candor's L-BFGS (‖∇L‖_∞ ≤ 1e-8, METHODS.md 2.5). The reference records how
# far, to first order, a test probability can lie from the exact optimum at any point meeting that
# rule: on an ill-conditioned problem this bound, not the optimiser, limits the agreement.
VECTOR_STOP_GTOL = 1e-8
# Relative step tolerance of the tight Platt reference (a root of the gradient).
PLATT_ROOT_XTOL = 1e-15
# Equal-width bin count of the binned metrics and equal-mass group count of adaptive ECE
# (METHODS.md 1.3–1.5: M = 15 is common practice).
BINS = 15
ADAPTIVE_GROUPS = 15


def with_zero_column(z):
    """Binary scores f as the logit pairs (0, f) (METHODS.md 0.3); K ≥ 3 logits unchanged."""
    z = np.asarray(z, dtype=np.float64)
    if z.shape[1] == 1:
        return np.hstack([np.zeros_like(z), z])
    return z


def temperature(z_cal, y_cal, z_test):
    """Temperature scaling by scipy.optimize.minimize_scalar (bounded Brent) on s = ln β of the
    mean NLL (1/n) Σ [logsumexp(β z_i) − β z_{i,y_i}] (METHODS.md 2.1)."""
    z, idx = with_zero_column(z_cal), np.arange(len(y_cal))

    def loss(s):
        u = np.exp(s) * z
        return float(np.mean(special.logsumexp(u, axis=1) - u[idx, y_cal]))

    res = optimize.minimize_scalar(
        loss,
        bounds=LOG_BETA_BOUNDS,
        method="bounded",
        options={"xatol": TEMPERATURE_XATOL, "maxiter": 1000},
    )
    assert res.success, res.message
    beta = float(np.exp(res.x))
    u = beta * z
    q = special.softmax(u, axis=1)
    gradient = float(np.mean(np.sum(q * z, axis=1) - z[idx, y_cal]))
    return {
        "temperature": 1.0 / beta,
        "beta": beta,
        "nll_identity": loss(0.0),
        "nll_fitted": float(res.fun),
        "gradient_beta": gradient,
        "test_probabilities": special.softmax(beta * with_zero_column(z_test), axis=1),
    }


def vector_scaling(z_cal, y_cal, z_test):
    """Vector scaling softmax(w ⊙ z + b) (METHODS.md 2.2, 2.5; binary scores f as (0, f)):
    scipy.optimize.minimize(method='L-BFGS-B', jac=True) on the mean NLL from the identity
    w = 1, b = 0, then polished to the root of the gradient by scipy.optimize.root(method='hybr')
    with the exact Hessian as Jacobian, over the identified parameters (b_0 fixed at 0, and w_k
    left out where class k's logits are all 0)."""
    z, y, idx = with_zero_column(z_cal), np.asarray(y_cal), np.arange(len(y_cal))
    k = z.shape[1]

    def parts(theta):
        u = z * theta[:k] + theta[k:]
        lse = special.logsumexp(u, axis=1)
        return u, lse, np.exp(u - lse[:, None])

    def loss_grad(theta):
        u, lse, r = parts(theta)
        r[idx, y] -= 1.0
        grad = np.concatenate([np.mean(r * z, axis=0), np.mean(r, axis=0)])
        return float(np.mean(lse - u[idx, y])), grad

    def hessian(theta):
        q = parts(theta)[2]
        s = q[:, :, None] * (np.eye(k)[None] - q[:, None, :])  # diag(q) − q qᵀ per row
        h_wb = np.einsum("ij,ijk->jk", z, s) / len(y)
        h_ww = np.einsum("ij,ijk,ik->jk", z, s, z) / len(y)
        return np.block([[h_ww, h_wb], [h_wb.T, s.mean(axis=0)]])

    theta0 = np.concatenate([np.ones(k), np.zeros(k)])

    def lbfgsb(gtol):
        return optimize.minimize(
            loss_grad, theta0, jac=True, method="L-BFGS-B",
            options={"gtol": gtol, "ftol": 0.0, "maxiter": VECTOR_MAXITER, "maxcor": 20}).x

    theta = lbfgsb(VECTOR_GTOL)
    theta[k:] -= theta[k]
    free = np.ones(2 * k, dtype=bool)
    free[k] = False
    free[:k][np.all(z == 0.0, axis=0)] = False

    def full(x):
        t = theta.copy()
        t[free] = x
        return t

    res = optimize.root(lambda x: loss_grad(full(x))[1][free], theta[free],
                        jac=lambda x: hessian(full(x))[np.ix_(free, free)],
                        method="hybr", options={"xtol": VECTOR_ROOT_XTOL})
    theta = full(res.x)
    value, grad = loss_grad(theta)
    assert np.max(np.abs(grad)) < 1e-12, (res.message, np.max(np.abs(grad)))
    zt = with_zero_column(z_test)
    proba = special.softmax(zt * theta[:k] + theta[k:], axis=1)
    # First-order worst case of a test probability over all stopping points with
    # ‖∇L‖_∞ ≤ VECTOR_STOP_GTOL: Δθ = H⁻¹ g, Δq = J Δθ, so |Δq_ij| ≤ gtol · ‖(J H⁻¹)_ij‖₁.
    dq_du = proba[:, :, None] * (np.eye(k)[None] - proba[:, None, :])
    jac = np.concatenate([dq_du * zt[:, None, :], dq_du], axis=2).reshape(-1, 2 * k)[:, free]
    sensitivity = np.linalg.solve(hessian(theta)[np.ix_(free, free)], jac.T)
    bound = VECTOR_STOP_GTOL * float(np.max(np.sum(np.abs(sensitivity), axis=0)))
    return {
        "nll_identity": loss_grad(theta0)[0],
        "nll_fitted": value,
        "gradient_max_abs": float(np.max(np.abs(grad))),
        "test_probabilities": proba,
        "probability_bound_at_stopping_rule": bound,
    }


def platt_objective(ab, f, t):
    """Platt's summed cross-entropy with smoothed targets t, z = A f + B, P(y=1) = σ(−z)
    (METHODS.md 2.6): Σ softplus(z) − (1 − t) z, with its gradient and Hessian."""
    z = ab[0] * f + ab[1]
    value = float(np.sum(np.logaddexp(0.0, z) - (1.0 - t) * z))
    p = special.expit(-z)
    d1, d2 = t - p, p * (1.0 - p)
    grad = np.array([np.sum(f * d1), np.sum(d1)])
    hess = np.array([[np.sum(f * f * d2), np.sum(f * d2)], [np.sum(f * d2), np.sum(d2)]])
    return value, grad, hess


def platt_targets(y):
    """Platt's smoothed targets (N+ + 1)/(N+ + 2) and 1/(N− + 2)."""
    n_pos, n_neg = float(np.sum(y == 1)), float(np.sum(y == 0))
    return np.where(y == 1, (n_pos + 1.0) / (n_pos + 2.0), 1.0 / (n_neg + 2.0))


def platt_tight(f, y, start):
    """The stationary point of the same Platt objective, ∇F(A, B) = 0, solved by
    scipy.optimize.root(method='hybr') with the exact Hessian as Jacobian, from `start`. (A
    minimiser stops where F no longer changes in f64, about 1e-7 away in gradient; the root
    of the gradient is pinned down to rounding.)"""
    t = platt_targets(y)
    res = optimize.root(
        lambda ab: platt_objective(ab, f, t)[1],
        np.asarray(start, dtype=np.float64),
        jac=lambda ab: platt_objective(ab, f, t)[2],
        method="hybr",
        options={"xtol": PLATT_ROOT_XTOL},
    )
    value, grad, _ = platt_objective(res.x, f, t)
    assert np.max(np.abs(grad)) < 1e-10, (res.message, grad)
    return {"a": float(res.x[0]), "b": float(res.x[1]), "objective_sum": value,
            "gradient_max_abs": float(np.max(np.abs(grad)))}


class ScoreColumns(ClassifierMixin, BaseEstimator):
    """A fitted classifier whose decision_function returns its input: the per-class scores
    (one column for K = 2), so CalibratedClassifierCV calibrates exactly those numbers."""

    def fit(self, X, y):
        self.classes_ = np.unique(y)
        return self

    def decision_function(self, X):
        X = np.asarray(X, dtype=np.float64)
        return X[:, 0] if X.shape[1] == 1 else X

    def predict(self, X):
        d = self.decision_function(X)
        return self.classes_[(d > 0).astype(int) if d.ndim == 1 else np.argmax(d, axis=1)]


def calibrated_classifier(method, s_cal, y_cal, s_test):
    """CalibratedClassifierCV(FrozenEstimator(ScoreColumns), method=...) fitted on the
    calibration scores; returns the fitted per-class calibrators and test probabilities."""
    est = FrozenEstimator(ScoreColumns().fit(s_cal, y_cal))
    cal = CalibratedClassifierCV(est, method=method).fit(s_cal, y_cal)
    (pair,) = cal.calibrated_classifiers_
    return pair.calibrators, cal.predict_proba(s_test)


def sigmoid_binary(f_cal, y_cal, f_test):
    """Platt on binary scores: sklearn.calibration._sigmoid_calibration and
    CalibratedClassifierCV(FrozenEstimator(...), method='sigmoid'), which must agree."""
    a, b = _sigmoid_calibration(f_cal, y_cal)
    (cal,), proba = calibrated_classifier("sigmoid", f_cal[:, None], y_cal, f_test[:, None])
    assert (cal.a_, cal.b_) == (a, b), ((cal.a_, cal.b_), (a, b))
    return float(a), float(b), proba[:, 1]


def isotonic_binary(s_cal, y_cal, s_test):
    """IsotonicRegression(out_of_bounds='clip') on probability scores: knots and predictions."""
    iso = IsotonicRegression(out_of_bounds="clip").fit(s_cal, y_cal.astype(np.float64))
    return {"x": iso.X_thresholds_, "y": iso.y_thresholds_, "test_predictions": iso.predict(s_test)}


def class_scores(z, kind):
    """Per-class scores as candor's one-vs-rest rule reads them (src/method/one_vs_rest.rs):
    K ≥ 3: p_k = softmax(z)_k ('probability') or ln p_k − ln(1 − p_k) ('log_odds');
    binary (0, f): σ(f) or f, one column."""
    z = np.asarray(z, dtype=np.float64)
    if z.shape[1] == 1:
        return special.expit(z) if kind == "probability" else z.copy()
    lp = z - special.logsumexp(z, axis=1, keepdims=True)
    if kind == "probability":
        return np.exp(lp)
    one_minus = np.where(lp > -np.log(2.0), np.log(-np.expm1(lp)), np.log1p(-np.exp(lp)))
    out = lp - one_minus
    assert np.all(np.isfinite(out)), "a class probability rounds to 1: log-odds are infinite"
    return out


def one_vs_rest(method, z_cal, y_cal, z_test):
    """One-vs-rest Platt ('sigmoid', on log-odds) or isotonic (on probabilities) with
    renormalisation, by CalibratedClassifierCV on candor's per-class scores."""
    kind = "log_odds" if method == "sigmoid" else "probability"
    s_cal, s_test = class_scores(z_cal, kind), class_scores(z_test, kind)
    calibrators, proba = calibrated_classifier(method, s_cal, y_cal, s_test)
    if method == "sigmoid":
        maps = []
        for k, c in enumerate(calibrators):
            positive = (y_cal == (1 if s_cal.shape[1] == 1 else k)).astype(int)
            tight = platt_tight(s_cal[:, k], positive, [c.a_, c.b_])
            # scikit-learn stops L-BFGS-B at gtol 1e-6 on the summed objective: its (A, B) lie
            # within about 1e-5 relative of the root of the gradient.
            assert abs(tight["a"] - c.a_) <= 1e-5 * abs(tight["a"]), (tight, c.a_)
            maps.append({"a": float(c.a_), "b": float(c.b_),
                         "tight": {"a": tight["a"], "b": tight["b"]}})
    else:
        maps = [{"x": c.X_thresholds_, "y": c.y_thresholds_} for c in calibrators]
    return {"maps": maps, "test_probabilities": proba}


def binned(conf, hit, n_bins):
    """Counts, Σ conf and Σ hit per right-closed equal-width bin: np.searchsorted(edges[1:-1],
    conf, side='left') with edges np.linspace(0, 1, M + 1) (METHODS.md 1.2, 5.1)."""
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    b = np.searchsorted(edges[1:-1], conf, side="left")
    return (np.bincount(b, minlength=n_bins), np.bincount(b, weights=conf, minlength=n_bins),
            np.bincount(b, weights=hit.astype(np.float64), minlength=n_bins))


def ece_mce(conf, hit, n_bins):
    """ECE = Σ (n_m/n)|acc_m − conf_m| and MCE = max |acc_m − conf_m| over non-empty bins."""
    cnt, s_conf, s_hit = binned(conf, hit, n_bins)
    nz = cnt > 0
    gap = np.abs(s_hit[nz] / cnt[nz] - s_conf[nz] / cnt[nz])
    return float(np.sum(cnt[nz] / len(conf) * gap)), float(np.max(gap))


def adaptive_ece(conf, hit, groups):
    """Equal-mass ECE: np.array_split(np.argsort(conf, kind='stable'), B) (METHODS.md 1.4)."""
    parts = np.array_split(np.argsort(conf, kind="stable"), groups)
    return float(sum(len(g) / len(conf) * abs(hit[g].mean() - conf[g].mean())
                     for g in parts if len(g)))


def aurc(conf, hit):
    """AURC as the mean of the n risks after a stable descending sort, AURC* and E-AURC
    (METHODS.md 3.9)."""
    order = np.argsort(-conf, kind="stable")
    errors = np.cumsum(~hit[order])
    risks = errors / np.arange(1, len(conf) + 1)
    n, e = len(conf), int(np.sum(~hit))
    optimal = float(np.sum([j / (n - e + j) for j in range(1, e + 1)]) / n)
    value = float(np.mean(risks))
    return value, optimal, value - optimal


def metrics(p, y):
    """The metric set on fixed probabilities p (n×K) and labels y."""
    k = p.shape[1]
    pred = np.argmax(p, axis=1)
    conf, hit = p[np.arange(len(y)), pred], pred == y
    onehot = np.eye(k)[y]
    brier = float(np.mean(np.sum((p - onehot) ** 2, axis=1)))
    assert abs(brier - brier_score_loss(y, p, scale_by_half=False)) < 1e-15
    ece, mce = ece_mce(conf, hit, BINS)
    classwise = float(np.mean([ece_mce(p[:, c], y == c, BINS)[0] for c in range(k)]))
    value, optimal, excess = aurc(conf, hit)
    out = {
        "accuracy": float(accuracy_score(y, pred)),
        "log_loss": float(log_loss(y, p, labels=np.arange(k))),
        "brier": brier,
        "ece": ece,
        "mce": mce,
        "adaptive_ece": adaptive_ece(conf, hit, ADAPTIVE_GROUPS),
        "classwise_ece": classwise,
        "aurc": value,
        "aurc_optimal": optimal,
        "e_aurc": excess,
    }
    if k == 2:
        out["brier_binary"] = float(brier_score_loss(y, p[:, 1]))
    return out
