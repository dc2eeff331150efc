"""Builds candor's conformance fixtures: held-out scores of general models on datasets that ship
inside scikit-learn, and reference results computed with numpy, scipy and scikit-learn.

Usage:  python3 tests/reference/make_fixtures.py [OUT_DIR]     (default tests/data/conformance)

Requires the pinned packages of tests/python/requirements.txt (numpy 2.4.6, scipy 1.17.1,
scikit-learn 1.9.1). With those versions the output is byte-identical from run to run; CI
regenerates it and fails if it differs from the committed files (.ci/run).

Datasets (all bundled in sklearn/datasets/data/, no download; attributions from their DESCR):
- load_digits: a copy of the test set of the UCI ML "Optical Recognition of Handwritten Digits"
  data set (E. Alpaydin, 1998), 1797 8×8 images, 10 classes.
- load_breast_cancer: a copy of the UCI ML "Breast Cancer Wisconsin (Diagnostic)" data set
  (W. H. Wolberg, W. N. Street, O. L. Mangasarian, 1995), 569 items, 0 = malignant, 1 = benign.
- load_wine: a copy of the UCI ML "Wine recognition" data set (original owners Forina, M. et al.,
  PARVUS; 1988), 178 items, 3 cultivars.

Each data set is split as in METHODS.md 5.3: train_test_split(test_size=0.5, random_state=0,
stratify=y) into train and rest, then the rest the same way into calibration and test.
"""

import os
import platform
import sys

sys.dont_write_bytecode = True  # no __pycache__ beside the committed scripts

# Same bytes on any x86-64 machine: one BLAS thread and one BLAS kernel (OpenBLAS picks a kernel
# per CPU, and kernels round differently), and numpy's SIMD loops limited to AVX2 (its AVX-512
# loops for exp/log round differently). Must be set before numpy loads.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ.pop("NPY_ENABLE_CPU_FEATURES", None)
if platform.machine().lower() in ("x86_64", "amd64"):
    os.environ["OPENBLAS_CORETYPE"] = "Haswell"
    os.environ["NPY_DISABLE_CPU_FEATURES"] = "X86_V4 AVX512_ICL AVX512_SPR"

import numpy as np  # noqa: E402
import scipy  # noqa: E402
import sklearn  # noqa: E402
from sklearn.datasets import load_breast_cancer, load_digits, load_wine  # noqa: E402
from sklearn.ensemble import RandomForestClassifier  # noqa: E402
from sklearn.linear_model import LogisticRegression  # noqa: E402
from sklearn.model_selection import train_test_split  # noqa: E402
from sklearn.naive_bayes import GaussianNB  # noqa: E402
from sklearn.pipeline import make_pipeline  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import build_references  # noqa: E402
import fixture_format as fmt  # noqa: E402

# Probabilities enter a logarithm as features clamped to [ε, 1] (METHODS.md 0.2–0.3).
LOG_EPSILON = 1e-12

DATASETS = {
    "digits": (load_digits, "UCI ML Optical Recognition of Handwritten Digits (test set copy; "
                            "E. Alpaydin, 1998), via sklearn.datasets.load_digits"),
    "breast_cancer": (load_breast_cancer, "UCI ML Breast Cancer Wisconsin (Diagnostic) (Wolberg, "
                                          "Street, Mangasarian, 1995), via "
                                          "sklearn.datasets.load_breast_cancer"),
    "wine": (load_wine, "UCI ML Wine recognition (Forina, M. et al., PARVUS, 1988), via "
                        "sklearn.datasets.load_wine"),
}

MODELS = {
    "logistic_regression": (
        "make_pipeline(StandardScaler(), LogisticRegression(C=100.0, max_iter=10000))",
        lambda: make_pipeline(StandardScaler(), LogisticRegression(C=100.0, max_iter=10000)),
    ),
    "random_forest": (
        "RandomForestClassifier(n_estimators=100, random_state=0)",
        lambda: RandomForestClassifier(n_estimators=100, random_state=0),
    ),
    "gaussian_nb": ("GaussianNB()", GaussianNB),
}

# (dataset, model) pairs whose held-out scores are written as score sets.
SCORE_SETS = [
    ("digits", "logistic_regression"),
    ("digits", "random_forest"),
    ("wine", "logistic_regression"),
    ("wine", "random_forest"),
    ("breast_cancer", "logistic_regression"),
    ("breast_cancer", "random_forest"),
]
# (dataset, model) pairs whose test-set predict_proba is the fixed input of the metric checks.
METRIC_SETS = [
    ("digits", "logistic_regression"),
    ("digits", "random_forest"),
    ("wine", "gaussian_nb"),
    ("breast_cancer", "logistic_regression"),
]


def split(dataset):
    """Calibration and test parts of a data set, with a model trained on the train part."""
    x, y = DATASETS[dataset][0](return_X_y=True)
    x_train, x_rest, y_train, y_rest = train_test_split(
        x, y, test_size=0.5, random_state=0, stratify=y)
    x_cal, x_test, y_cal, y_test = train_test_split(
        x_rest, y_rest, test_size=0.5, random_state=0, stratify=y_rest)
    return (x_train, y_train), (x_cal, y_cal), (x_test, y_test)


def scores(model, x):
    """Logits the model emits: decision_function where it exists (binary: one column f), else
    ln max(p, ε) of predict_proba (binary: f = ln max(p₁, ε) − ln max(p₀, ε)), METHODS.md 0.3."""
    if hasattr(model, "decision_function"):
        z = model.decision_function(x)
        return z[:, None] if z.ndim == 1 else z
    lp = np.log(np.maximum(model.predict_proba(x), LOG_EPSILON))
    return lp[:, 1:] - lp[:, :1] if lp.shape[1] == 2 else lp


def score_name(model, columns):
    """How the stored logits were obtained, in words."""
    if hasattr(model, "decision_function"):
        return "decision_function" + (" (log-odds f of class 1)" if columns == 1 else "")
    if columns == 1:
        return f"f = ln max(p1, {LOG_EPSILON}) - ln max(p0, {LOG_EPSILON}) of predict_proba"
    return f"ln max(p, {LOG_EPSILON}) of predict_proba"


def score_set(dataset, model_name):
    """Held-out logits of one model on one data set, rounded to fmt.INPUT_DIGITS."""
    train, cal, test = split(dataset)
    model = MODELS[model_name][1]().fit(*train)
    z_cal, z_test = fmt.round_input(scores(model, cal[0])), fmt.round_input(scores(model, test[0]))
    return {
        "name": f"{dataset}_{model_name}",
        "dataset": dataset,
        "origin": DATASETS[dataset][1],
        "model": MODELS[model_name][0],
        "split": "train_test_split(test_size=0.5, random_state=0, stratify=y), twice "
                 "(train | calibration | test)",
        "score": score_name(model, z_cal.shape[1]),
        "classes": int(len(np.unique(train[1]))),
        "class_names": [str(c) for c in DATASETS[dataset][0]().target_names],
        "columns": int(z_cal.shape[1]),
        "calibration": {"labels": cal[1], "logits": z_cal},
        "test": {"labels": test[1], "logits": z_test},
    }


def main():
    out_dir = sys.argv[1] if len(sys.argv) > 1 else os.path.join(
        os.path.dirname(os.path.abspath(__file__)), "..", "data", "conformance")
    os.makedirs(out_dir, exist_ok=True)
    versions = {"numpy": np.__version__, "scipy": scipy.__version__,
                "scikit-learn": sklearn.__version__}
    sets = [score_set(d, m) for d, m in SCORE_SETS]
    for s in sets:
        fmt.write(out_dir, f"scores_{s['name']}.json", dict(s, versions=versions))
    for name, body in build_references.all_references(sets, split, MODELS, METRIC_SETS):
        fmt.write(out_dir, name, dict(body, versions=versions))


if __name__ == "__main__":
    main()
