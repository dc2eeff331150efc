"""Rounding and the JSON layout of the conformance fixtures.

Numbers are rounded to a fixed count of significant digits and written with Python's shortest
round-trip repr; keys are sorted; a list of numbers stays on one line and a list of rows puts one
row per line, so a regenerated file diffs readably.
"""

import json
import os

import numpy as np

# Significant digits of stored inputs (logits, probabilities). References are computed from the
# rounded inputs, so rounding changes nothing the Rust side compares.
INPUT_DIGITS = 10
# Significant digits of stored reference results: far below every tolerance the Rust tests apply
# (1e-6 relative for fitted parameters and probabilities, 1e-9 for metrics), and a margin against
# last-bit differences should a library's internals change rounding.
REFERENCE_DIGITS = 12
# Decimal places of stored reference probabilities (absolute error 5e-13, far below the 1e-6
# absolute tolerance they are compared with).
PROBABILITY_DECIMALS = 12


def _round(x, digits):
    if isinstance(x, dict):
        return {k: _round(v, digits) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_round(v, digits) for v in x]
    arr = np.asarray(x)
    if arr.ndim > 0:
        return [_round(v, digits) for v in arr]
    if np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.bool_):
        return int(arr)
    v = float(arr)
    if not np.isfinite(v):
        raise ValueError(f"non-finite value {v} cannot be written to a fixture")
    return float(f"{v:.{digits}g}") + 0.0  # + 0.0 turns -0.0 into 0.0


def round_input(x):
    """Rounds an array to INPUT_DIGITS significant digits and returns it as float64."""
    return np.asarray(_round(np.asarray(x, dtype=np.float64), INPUT_DIGITS), dtype=np.float64)


def reference(x):
    """A reference value (scalar, array or nested list) as plain Python numbers."""
    return _round(x, REFERENCE_DIGITS)


def probabilities(p):
    """Reference probabilities rounded to PROBABILITY_DECIMALS decimal places (they are compared
    with an absolute tolerance; tiny values then take little room)."""
    return [[float(round(v, PROBABILITY_DECIMALS)) + 0.0 for v in row]
            for row in np.asarray(p, dtype=np.float64).tolist()]


def plain(x):
    """Converts numpy containers (already rounded) to plain Python values, recursively."""
    if isinstance(x, dict):
        return {k: plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [plain(v) for v in x]
    if isinstance(x, np.ndarray):
        return plain(x.tolist())
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.floating):
        return float(x)
    return x


def _dump(x, depth):
    pad, inner = " " * depth, " " * (depth + 1)
    if isinstance(x, dict):
        if not x:
            return "{}"
        items = [f"{inner}{json.dumps(k)}: {_dump(x[k], depth + 1)}" for k in sorted(x)]
        return "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(x, list) and any(isinstance(v, (list, dict)) for v in x):
        return "[\n" + ",\n".join(inner + _dump(v, depth + 1) for v in x) + "\n" + pad + "]"
    return json.dumps(x, allow_nan=False, separators=(", ", ": "))


def write(out_dir, name, body):
    """Writes one fixture file."""
    with open(os.path.join(out_dir, name), "w", encoding="utf-8", newline="\n") as f:
        f.write(_dump(plain(body), 0) + "\n")
