"""Calling candor from Python with grpcio.

Usage: python3 client.py TARGET ROWS.jsonl EXPECTED.csv

  TARGET        the sidecar's data-plane address, e.g. 127.0.0.1:50551
  ROWS.jsonl    predictions to send, one {"logits": [...], "label": k} per line
  EXPECTED.csv  `candor apply --decisions` on the same rows and map: the answers to expect

Calls Calibrate (one row), CalibrateStream (the other rows), RecordOutcome (a person's label for
an earlier request, then the same label again) and the documented errors, prints what it got,
and exits 1 on any answer that differs from what was expected.
Needs: pip install -r requirements.txt (grpcio, grpcio-tools).
"""

import atexit
import csv
import json
import os
import shutil
import sys
import tempfile

import grpc
from grpc_tools import protoc

MODEL = "letter-sorter"
# The sidecar answers in float32, `candor apply` prints float32: allow a few float32 ulps.
F32_TOLERANCE = 1e-6
PROTO_DIR = os.environ.get(
    "CANDOR_PROTO_DIR", os.path.join(os.path.dirname(os.path.abspath(__file__)), "../../proto"))


def load_stubs():
    """Generates the Python modules for candor's API from proto/ into a temporary folder."""
    out = tempfile.mkdtemp(prefix="candor-stubs-")
    atexit.register(shutil.rmtree, out, ignore_errors=True)
    args = ["protoc", f"-I{PROTO_DIR}", f"--python_out={out}", f"--grpc_python_out={out}",
            "candor/v1/calibrator.proto"]
    if protoc.main(args) != 0:
        sys.exit(f"protoc failed on {PROTO_DIR}/candor/v1/calibrator.proto")
    sys.path.insert(0, out)


load_stubs()
from candor.v1 import calibrator_pb2 as pb  # noqa: E402  (generated just above)
from candor.v1 import calibrator_pb2_grpc as pb_grpc  # noqa: E402

failures = 0


def check(what, ok, got):
    global failures
    print(f"{'ok  ' if ok else 'FAIL'} {what}: {got}")
    failures += 0 if ok else 1


def check_answer(what, response, want):
    """Compares one CalibrateResponse with a row of `candor apply --decisions`."""
    close = len(response.probabilities) == len(want["p"]) and all(
        abs(g - w) <= F32_TOLERANCE for g, w in zip(response.probabilities, want["p"]))
    decision = pb.Decision.Name(response.decision)
    ok = (close and response.predicted_class == want["predicted"]
          and decision == "DECISION_" + want["decision"].upper())
    check(what, ok, f"class {response.predicted_class}, confidence {response.confidence:.4f}, "
          f"{decision}, map {response.map_version}")


def check_error(what, call, code):
    try:
        call()
        check(what, False, "no error")
    except grpc.RpcError as e:
        check(what, e.code() == code, f"{e.code().name}: {e.details()}")


def main(target, rows_path, expected_path):
    with open(rows_path) as f:
        rows = [json.loads(line) for line in f if line.strip()]
    with open(expected_path) as f:
        expected = [{"p": [float(r[f"p{k}"]) for k in range(len(rows[0]["logits"]))],
                     "predicted": int(r["predicted"]), "decision": r["decision"]}
                    for r in csv.DictReader(f)]

    with grpc.insecure_channel(target) as channel:
        grpc.channel_ready_future(channel).result(timeout=10)
        stub = pb_grpc.CalibratorStub(channel)

        # One prediction: raw logits in, calibrated probabilities and a decision out.
        first = stub.Calibrate(pb.CalibrateRequest(
            model=MODEL, logits=rows[0]["logits"], request_id="py-0"), timeout=5)
        check_answer("Calibrate py-0", first, expected[0])

        # Many predictions over one stream, answered in order.
        requests = [pb.CalibrateRequest(model=MODEL, logits=r["logits"], request_id=f"py-{i}")
                    for i, r in enumerate(rows[1:], start=1)]
        results = list(stub.CalibrateStream(iter(requests), timeout=10))
        check("CalibrateStream answers", len(results) == len(requests), len(results))
        for i, result in enumerate(results, start=1):
            if result.WhichOneof("outcome") == "error":
                check(f"CalibrateStream py-{i}", False, result.error.message)
            else:
                check_answer(f"CalibrateStream py-{i}", result.response, expected[i])

        # A person's label for request py-0; sending the same label again is a harmless no-op.
        label = rows[0]["label"]
        outcome = pb.OutcomeRequest(request_id="py-0", true_label=label)
        told = stub.RecordOutcome(outcome, timeout=5)
        check("RecordOutcome py-0", not told.duplicate and told.correct == (
            first.predicted_class == label), f"correct={told.correct} duplicate={told.duplicate}")
        again = stub.RecordOutcome(outcome, timeout=5)
        check("RecordOutcome py-0 again", again.duplicate, f"duplicate={again.duplicate}")

        # The documented errors.
        check_error("wrong number of logits", lambda: stub.Calibrate(
            pb.CalibrateRequest(model=MODEL, logits=[1.0, 2.0]), timeout=5),
            grpc.StatusCode.INVALID_ARGUMENT)
        check_error("unknown model", lambda: stub.Calibrate(
            pb.CalibrateRequest(model="no-such-model", logits=rows[0]["logits"]), timeout=5),
            grpc.StatusCode.NOT_FOUND)
        check_error("outcome for an unknown request", lambda: stub.RecordOutcome(
            pb.OutcomeRequest(request_id="never-sent", true_label=0), timeout=5),
            grpc.StatusCode.NOT_FOUND)
        check_error("another label for py-0", lambda: stub.RecordOutcome(
            pb.OutcomeRequest(request_id="py-0", true_label=(label + 1) % 6), timeout=5),
            grpc.StatusCode.ALREADY_EXISTS)

    print(f"python client: {'all answers as expected' if failures == 0 else f'{failures} wrong'}")
    return 1 if failures else 0


if __name__ == "__main__":
    if len(sys.argv) != 4:
        sys.exit(__doc__)
    sys.exit(main(*sys.argv[1:]))
