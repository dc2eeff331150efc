"""Assembles the reference fixtures from the score sets (called by make_fixtures.py)."""

import numpy as np
from scipy import special

import fixture_format as fmt
import references as ref

# One-vs-rest cases: (score set, scikit-learn method). Platt reads log-odds, which are infinite
# where a class probability rounds to 1, so digits with logistic regression is isotonic only.
ONE_VS_REST = [
    ("wine_logistic_regression", "isotonic"),
    ("wine_logistic_regression", "sigmoid"),
    ("wine_random_forest", "isotonic"),
    ("wine_random_forest", "sigmoid"),
    ("digits_logistic_regression", "isotonic"),
    ("digits_random_forest", "isotonic"),
    ("digits_random_forest", "sigmoid"),
    ("breast_cancer_logistic_regression", "isotonic"),
    ("breast_cancer_logistic_regression", "sigmoid"),
    ("breast_cancer_random_forest", "isotonic"),
    ("breast_cancer_random_forest", "sigmoid"),
]


# Score sets for vector scaling: those with a finite optimum. Left out: wine with logistic
# regression (the calibration part is separable, the NLL goes to 0) and the random forests with
# K ≥ 3 (logits ln max(p, ε) put many rows at ln ε, the Hessian has null directions besides the
# bias shift and the fitted w run into the thousands).
VECTOR_SCALING = ["digits_logistic_regression", "breast_cancer_logistic_regression",
                  "breast_cancer_random_forest"]


def rounded(name, result):
    """A case: reference probabilities rounded by decimals, everything else by digits."""
    case = {"scores": name}
    for k, v in result.items():
        case[k] = fmt.probabilities(v) if k == "test_probabilities" else fmt.reference(v)
    return case


def parts(s):
    """Calibration logits and labels, test logits and labels of a score set."""
    cal, test = s["calibration"], s["test"]
    return cal["logits"], np.asarray(cal["labels"]), test["logits"], np.asarray(test["labels"])


def temperature(sets):
    cases = []
    for s in sets:
        z_cal, y_cal, z_test, _ = parts(s)
        r = ref.temperature(z_cal, y_cal, z_test)
        cases.append(rounded(s["name"], r))
    return {
        "method": "temperature scaling, softmax(β z), β = 1/T (METHODS.md 2.1); binary scores f "
                  "read as (0, f)",
        "reference": "scipy.optimize.minimize_scalar(method='bounded', bounds=(-10, 10), "
                     f"xatol={ref.TEMPERATURE_XATOL}) on s = ln β of the mean NLL written with "
                     "scipy.special.logsumexp; test probabilities scipy.special.softmax(β z)",
        "cases": cases,
    }


def vector_scaling(sets):
    cases = []
    for s in (s for s in sets if s["name"] in VECTOR_SCALING):
        z_cal, y_cal, z_test, _ = parts(s)
        r = ref.vector_scaling(z_cal, y_cal, z_test)
        cases.append(rounded(s["name"], r))
    return {
        "method": "vector scaling, softmax(w ⊙ z + b) (METHODS.md 2.2); binary scores f read "
                  "as (0, f)",
        "reference": "scipy.optimize.minimize(method='L-BFGS-B', jac=True, options={'gtol': "
                     f"{ref.VECTOR_GTOL}, 'ftol': 0.0, 'maxcor': 20}}) on the mean NLL from "
                     "w = 1, b = 0, polished by scipy.optimize.root(method='hybr', jac=Hessian, "
                     f"xtol={ref.VECTOR_ROOT_XTOL}) on the gradient over the identified "
                     "parameters (b_0 = 0; w_k dropped where class k's logits are all 0); compare "
                     "probabilities and NLL (b is defined up to a shift). "
                     "probability_bound_at_stopping_rule: first-order bound on how far a test "
                     "probability can move at any point with a max-abs gradient of "
                     f"{ref.VECTOR_STOP_GTOL} (candor's stopping rule): {ref.VECTOR_STOP_GTOL}·"
                     "max ‖(J H⁻¹)_row‖₁, J the test probabilities' Jacobian, H the Hessian",
        "cases": cases,
    }


def platt(sets):
    cases = []
    for s in sets:
        if s["columns"] != 1:
            continue
        z_cal, y_cal, z_test, _ = parts(s)
        f_cal, f_test = z_cal[:, 0], z_test[:, 0]
        a, b, proba = ref.sigmoid_binary(f_cal, y_cal, f_test)
        tight = ref.platt_tight(f_cal, y_cal, [a, b])
        cases.append({
            "scores": s["name"],
            "sklearn": {"a": fmt.reference(a), "b": fmt.reference(b),
                        "test_probabilities": fmt.reference(proba)},
            "tight": fmt.reference(tight),
        })
    return {
        "method": "Platt scaling P(y=1|f) = 1/(1 + exp(A f + B)) with Platt's smoothed targets "
                  "(METHODS.md 2.6) on the binary score f",
        "reference": "sklearn: sklearn.calibration._sigmoid_calibration(f, y), equal to "
                     "CalibratedClassifierCV(FrozenEstimator(scores), method='sigmoid'), whose "
                     "test probabilities are given; tight: the root of the gradient of the same "
                     "summed objective by scipy.optimize.root(method='hybr', jac=Hessian, "
                     f"xtol={ref.PLATT_ROOT_XTOL}) started at sklearn's (A, B)",
        "cases": cases,
    }


def isotonic(sets):
    cases = []
    for s in sets:
        if s["columns"] != 1:
            continue
        z_cal, y_cal, z_test, _ = parts(s)
        s_cal = fmt.round_input(special.expit(z_cal[:, 0]))
        s_test = fmt.round_input(special.expit(z_test[:, 0]))
        r = ref.isotonic_binary(s_cal, y_cal, s_test)
        cases.append({
            "scores": s["name"],
            "calibration_scores": s_cal,
            "test_scores": s_test,
            **{k: fmt.reference(v) for k, v in r.items()},
        })
    return {
        "method": "isotonic regression on the probability score s = σ(f) (METHODS.md 2.8)",
        "reference": "sklearn.isotonic.IsotonicRegression(out_of_bounds='clip').fit(s, y): "
                     "X_thresholds_ as x, y_thresholds_ as y, predict(test scores); the scores "
                     "are scipy.special.expit(f) rounded as stored here",
        "cases": cases,
    }


def one_vs_rest(sets):
    by_name = {s["name"]: s for s in sets}
    cases = []
    for name, method in ONE_VS_REST:
        z_cal, y_cal, z_test, _ = parts(by_name[name])
        r = ref.one_vs_rest(method, z_cal, y_cal, z_test)
        cases.append(dict(rounded(name, r), method=method))
    return {
        "method": "one-vs-rest with renormalisation (METHODS.md 2.11 (A)): K = 2 one map on "
                  "class 1, q0 = 1 − q1; K ≥ 3 one map per class, q = u / Σu, uniform if Σu = 0",
        "reference": "CalibratedClassifierCV(FrozenEstimator(scores), method=...) fitted on "
                     "candor's per-class scores (src/method/one_vs_rest.rs): log-odds "
                     "ln p_k − ln(1 − p_k) for 'sigmoid', p_k = softmax(z)_k for 'isotonic'; "
                     "binary f or σ(f). Applied to a model directly, scikit-learn would calibrate "
                     "its decision_function columns instead; maps: a_, b_ or X_thresholds_, "
                     "y_thresholds_ per class; for 'sigmoid' also 'tight', the root of the "
                     "gradient of the same per-class Platt objective (scipy.optimize.root, as "
                     "in reference_platt.json)",
        "cases": cases,
    }


def metrics(split, models, metric_sets):
    cases = []
    for dataset, model_name in metric_sets:
        train, _, test = split(dataset)
        model = models[model_name][1]().fit(*train)
        p = fmt.round_input(model.predict_proba(test[0]))
        cases.append({
            "name": f"{dataset}_{model_name}",
            "source": f"{models[model_name][0]}.predict_proba on the {dataset} test part",
            "classes": int(p.shape[1]),
            "labels": test[1],
            "probabilities": p,
            "reference": fmt.reference(ref.metrics(p, test[1])),
        })
    return {
        "method": "metrics on fixed probabilities (METHODS.md 1.1–1.7, 3.9)",
        "reference": "accuracy: sklearn.metrics.accuracy_score; log_loss: sklearn.metrics."
                     "log_loss(labels=range(K)) (clips to machine epsilon, no renormalisation); "
                     "brier: mean Σ_k (q_k − 1[y=k])², NOT halved for any K (equals brier_score_"
                     "loss(scale_by_half=False)); brier_binary (K = 2): brier_score_loss(y, q1), "
                     f"halved; ece, mce: top-label, {ref.BINS} right-closed equal-width bins by "
                     "np.searchsorted(np.linspace(0, 1, M + 1)[1:-1], conf) and np.bincount; "
                     f"adaptive_ece: {ref.ADAPTIVE_GROUPS} groups of np.array_split(np.argsort("
                     "conf, kind='stable'), B); classwise_ece: mean over k of the same binned "
                     "ECE of q_k against 1[y=k]; aurc: mean risk after a stable descending sort, "
                     "aurc_optimal = (1/n) Σ_{j≤e} j/(n − e + j), e_aurc = aurc − aurc_optimal",
        "cases": cases,
    }


def all_references(sets, split, models, metric_sets):
    """(file name, body) of every reference fixture."""
    return [
        ("reference_temperature.json", temperature(sets)),
        ("reference_vector_scaling.json", vector_scaling(sets)),
        ("reference_platt.json", platt(sets)),
        ("reference_isotonic.json", isotonic(sets)),
        ("reference_one_vs_rest.json", one_vs_rest(sets)),
        ("reference_metrics.json", metrics(split, models, metric_sets)),
    ]
