"""A Python grpcio client against a real `candor serve`, checked against numpy.

Usage: check_client.py CANDOR_BINARY REPO_DIR STUBS_DIR
STUBS_DIR holds the modules generated from proto/ by grpc_tools.protoc.

Starts the sidecar on an ephemeral loopback port with demo-data/maps, waits for the standard
health service to report SERVING, then checks answers and documented errors. Expected
probabilities are softmax(z / T) computed with numpy from the demo map's temperature.
"""

import json
import math
import subprocess
import sys

import grpc
import numpy as np

binary, repo, stubs = sys.argv[1:4]
sys.path.insert(0, stubs)

from candor.v1 import calibrator_pb2 as pb  # noqa: E402
from candor.v1 import calibrator_pb2_grpc as pb_grpc  # noqa: E402
from grpc_health.v1 import health_pb2, health_pb2_grpc  # noqa: E402

passed, failed = 0, 0


def check(name, ok, detail=""):
    global passed, failed
    if ok:
        passed += 1
    else:
        failed += 1
        print(f"FAILED {name}: {detail}", file=sys.stderr)


with open(f"{repo}/demo-data/maps/letter-sorter.json") as f:
    demo_map = json.load(f)
temperature = demo_map["method"]["temperature"]
threshold = demo_map["policy"]["threshold"]
rows = []
with open(f"{repo}/demo-data/traffic.jsonl") as f:
    for line in f:
        rows.append(json.loads(line))
        if len(rows) == 300:
            break


def expected(logits):
    z = np.asarray(logits, dtype=np.float64) / temperature
    z = z - z.max()
    p = np.exp(z)
    return p / p.sum()


server = subprocess.Popen(
    [binary, "serve", "--listen", "127.0.0.1:0", "--log-format", "json",
     "--maps", f"{repo}/demo-data/maps"],
    stderr=subprocess.PIPE, text=True)
try:
    addr = None
    for line in server.stderr:
        event = json.loads(line)
        if event["fields"].get("message") == "listening":
            addr = event["fields"]["addr"]
            break
    assert addr, "the sidecar exited before listening"
    channel = grpc.insecure_channel(addr)
    health = health_pb2_grpc.HealthStub(channel)
    for reply in health.Watch(health_pb2.HealthCheckRequest(service="candor.v1.Calibrator"),
                              timeout=30):
        if reply.status == health_pb2.HealthCheckResponse.SERVING:
            break
    check("health SERVING", True)

    stub = pb_grpc.CalibratorStub(channel)
    for i, row in enumerate(rows[:200]):
        r = stub.Calibrate(pb.CalibrateRequest(model="letter-sorter", logits=row["logits"],
                                               request_id=f"py-{i}"))
        want = expected(np.float32(row["logits"]))
        got = np.asarray(r.probabilities, dtype=np.float64)
        top = int(np.argmax(want))
        decision = pb.DECISION_ACCEPT if want[top] >= threshold else pb.DECISION_DEFER
        check(f"row {i} probabilities", np.allclose(got, want, rtol=0, atol=1e-6),
              f"{got} vs {want}")
        check(f"row {i} class", r.predicted_class == top, f"{r.predicted_class} vs {top}")
        check(f"row {i} decision", r.decision == decision or abs(want[top] - threshold) < 1e-6,
              f"{r.decision} vs {decision}")
        check(f"row {i} echo", r.request_id == f"py-{i}" and r.map_version == demo_map["map_version"])

    stream_rows = rows[200:300]
    replies = list(stub.CalibrateStream(
        pb.CalibrateRequest(model="letter-sorter", logits=row["logits"]) for row in stream_rows))
    check("stream length", len(replies) == len(stream_rows), len(replies))
    for row, reply in zip(stream_rows, replies):
        got = np.asarray(reply.response.probabilities, dtype=np.float64)
        check("stream probabilities",
              np.allclose(got, expected(np.float32(row["logits"])), rtol=0, atol=1e-6))

    batch = stub.CalibrateBatch(pb.CalibrateBatchRequest(rows=[
        pb.CalibrateRequest(model="letter-sorter", logits=rows[0]["logits"]),
        pb.CalibrateRequest(model="letter-sorter", logits=[1.0, 2.0]),
    ]))
    check("batch good row", batch.results[0].WhichOneof("outcome") == "response")
    bad = batch.results[1]
    check("batch bad row", bad.WhichOneof("outcome") == "error"
          and bad.error.code == grpc.StatusCode.INVALID_ARGUMENT.value[0]
          and "expected 6 logits, got 2" in bad.error.message, str(bad))

    errors = [
        (pb.CalibrateRequest(model="letter-sorter", logits=[1.0, 2.0]),
         grpc.StatusCode.INVALID_ARGUMENT, "expected 6 logits, got 2"),
        (pb.CalibrateRequest(model="letter-sorter", logits=[]),
         grpc.StatusCode.INVALID_ARGUMENT, "logits is empty"),
        (pb.CalibrateRequest(model="letter-sorter", logits=[1, 2, math.nan, 0, 0, 0]),
         grpc.StatusCode.INVALID_ARGUMENT, "logits[2] is NaN"),
        (pb.CalibrateRequest(model="letter-sorter", logits=[1, 2, 3, 0, 0, math.inf]),
         grpc.StatusCode.INVALID_ARGUMENT, "logits[5] is inf"),
        (pb.CalibrateRequest(model="nobody", logits=[1, 2, 3, 4, 5, 6]),
         grpc.StatusCode.NOT_FOUND, "no map for model"),
    ]
    for request, code, text in errors:
        try:
            stub.Calibrate(request)
            check(f"error {text}", False, "no error raised")
        except grpc.RpcError as e:
            check(f"error {text}", e.code() == code and text in e.details(),
                  f"{e.code()} {e.details()}")

    maps = stub.ListMaps(pb.ListMapsRequest()).maps
    check("list maps", len(maps) == 1 and maps[0].digest == demo_map["digest"]
          and maps[0].accepted + maps[0].deferred == 301, str(maps))  # 200 + 100 + 1 good batch row
    channel.close()
finally:
    server.terminate()
    code = server.wait(timeout=30)
check("sidecar exits 0 on SIGTERM", code == 0, code)
print(f"python client: {passed} passed, {failed} failed")
sys.exit(1 if failed else 0)
