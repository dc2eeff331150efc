"""A hand-written candor.v1.Calibrator for temperature maps: plain grpcio + numpy, what a team
would write for itself instead of running candor. benches/sidecar_compare measures it beside
`candor serve` with the same client and payloads.

Usage: python3 bench/python_server.py [--listen 127.0.0.1:0] [--workers 16] MAP.json...

Stubs are generated at start-up from proto/ with grpcio-tools into a temporary directory (nothing
generated is committed). Prints "listening HOST:PORT" once serving; runs until killed.
"""

import argparse
import json
import math
import os
import sys
import tempfile
from concurrent import futures

import grpc
import numpy as np
from grpc_tools import protoc

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def load_stubs():
    out = tempfile.mkdtemp(prefix="candor-stubs-")
    proto = os.path.join(REPO, "proto")
    rc = protoc.main([
        "protoc", f"-I{proto}", f"--python_out={out}", f"--grpc_python_out={out}",
        os.path.join(proto, "candor", "v1", "calibrator.proto"),
    ])
    if rc != 0:
        sys.exit(f"protoc failed with {rc}")
    sys.path.insert(0, out)
    from candor.v1 import calibrator_pb2, calibrator_pb2_grpc  # noqa: E402
    return calibrator_pb2, calibrator_pb2_grpc


class TemperatureMap:
    def __init__(self, path):
        with open(path) as f:
            doc = json.load(f)
        method = doc["method"]
        if method["kind"] != "temperature" or doc["input"] != "logits":
            sys.exit(f"{path}: only temperature maps on logits are served here")
        self.model = doc["model"]
        self.version = doc["map_version"]
        self.classes = doc["classes"]
        self.temperature = float(method["temperature"])
        t = doc["policy"]["threshold"]
        self.threshold = math.inf if t is None else float(t)


def make_servicer(pb, rpc, maps):
    class Calibrator(rpc.CalibratorServicer):
        def _map(self, model, context):
            if model in maps:
                return maps[model]
            if model == "" and len(maps) == 1:
                return next(iter(maps.values()))
            context.abort(grpc.StatusCode.NOT_FOUND, f"no map for model {model!r}")

        def _answer(self, request, context):
            m = self._map(request.model, context)
            z = np.asarray(request.logits, dtype=np.float64)
            if z.size != m.classes:
                context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                              f"expected {m.classes} logits, got {z.size}")
            if not np.isfinite(z).all():
                context.abort(grpc.StatusCode.INVALID_ARGUMENT, "every logit must be finite")
            z = z / m.temperature
            e = np.exp(z - z.max())
            p = e / e.sum()
            k = int(p.argmax())
            confidence = float(p[k])
            accept = confidence >= m.threshold
            return pb.CalibrateResponse(
                probabilities=p.tolist(),
                predicted_class=k,
                confidence=confidence,
                decision=pb.DECISION_ACCEPT if accept else pb.DECISION_DEFER,
                threshold=m.threshold,
                map_version=m.version,
                request_id=request.request_id,
            )

        def Calibrate(self, request, context):
            return self._answer(request, context)

        def CalibrateStream(self, request_iterator, context):
            for request in request_iterator:
                yield pb.CalibrateResult(response=self._answer(request, context))

    return Calibrator()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--listen", default="127.0.0.1:0")
    parser.add_argument("--workers", type=int, default=16)
    parser.add_argument("maps", nargs="+")
    args = parser.parse_args()
    pb, rpc = load_stubs()
    maps = {}
    for path in args.maps:
        m = TemperatureMap(path)
        maps[m.model] = m
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=args.workers))
    rpc.add_CalibratorServicer_to_server(make_servicer(pb, rpc, maps), server)
    host = args.listen.rsplit(":", 1)[0]
    port = server.add_insecure_port(args.listen)
    server.start()
    print(f"listening {host}:{port}", flush=True)
    server.wait_for_termination()


if __name__ == "__main__":
    main()
