#!/usr/bin/env python3
"""Talk to a convoy server from Python with grpcio.

Needs `pip install grpcio grpcio-health-checking` (pinned in requirements.txt) and stubs
generated from convoy's proto, on the import path:

    python -m grpc_tools.protoc -I proto --python_out=STUBS --grpc_python_out=STUBS \
        proto/convoy/v1/predictor.proto
    PYTHONPATH=STUBS python client_example.py IMAGE [ADDRESS]

Steps: health check, Catalog, Predict one image (top 3), then one request that the server
refuses, to show how a gRPC status reads.
"""

import argparse
import struct
import sys

import grpc
from grpc_health.v1 import health_pb2, health_pb2_grpc

from convoy.v1 import predictor_pb2 as pb
from convoy.v1 import predictor_pb2_grpc as pb_grpc

TIMEOUT_S = 10  # every call gets a deadline: a hung server must not hang the client


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("image", help="PNG, JPEG, BMP, WebP, GIF or TIFF file")
    parser.add_argument("address", nargs="?", default="127.0.0.1:7171")
    args = parser.parse_args()

    with grpc.insecure_channel(args.address) as channel:
        try:
            return run(channel, args.image)
        except grpc.RpcError as e:
            print(f"{args.address}: {e.code().name}: {e.details()}", file=sys.stderr)
            return 1


def run(channel: grpc.Channel, image_path: str) -> int:
    # 1. Health: the standard service; "convoy.v1.Predictor" is SERVING once a model is up.
    health = health_pb2_grpc.HealthStub(channel)
    status = health.Check(
        health_pb2.HealthCheckRequest(service="convoy.v1.Predictor"), timeout=TIMEOUT_S
    ).status
    print("health:", health_pb2.HealthCheckResponse.ServingStatus.Name(status))
    if status != health_pb2.HealthCheckResponse.SERVING:
        return 1

    # 2. Catalog: which models are loaded and which one an empty `model` field means.
    predictor = pb_grpc.PredictorStub(channel)
    catalog = predictor.Catalog(pb.CatalogRequest(), timeout=TIMEOUT_S)
    print("default model:", catalog.default_model or "(none)")
    for m in catalog.models:
        print(f"  {m.name} (active version {m.active_version or '-'})")

    # 3. Predict: send the file's bytes as they are; the server decodes and prepares them.
    with open(image_path, "rb") as f:
        image = f.read()
    reply = predictor.Predict(
        pb.PredictRequest(samples=[pb.Sample(encoded_image=image)], top_k=3), timeout=TIMEOUT_S
    )
    print(f"{image_path} -> {reply.model} {reply.version}")
    for rank, r in enumerate(reply.outcomes[0].top, start=1):
        print(f"  {rank}. {r.label:<20} {r.probability:.4f}")

    # 4. Errors arrive as grpc.RpcError with a status code and a message. A prepared tensor
    # is little-endian f32 in row-major order; shape [1, 2, 2] fits no model here.
    bad = pb.Tensor(shape=[1, 2, 2], f32_le=struct.pack("<4f", 0.0, 0.0, 0.0, 0.0))
    try:
        predictor.Predict(pb.PredictRequest(samples=[pb.Sample(tensor=bad)]), timeout=TIMEOUT_S)
    except grpc.RpcError as e:
        print(f"wrong shape refused: {e.code().name}: {e.details()}")
    else:
        print("wrong shape was accepted; expected an error", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
