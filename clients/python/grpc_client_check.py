"""Calls every apportion RPC, the standard health service and reflection with
Python grpcio, an independent gRPC implementation (shared/TESTING.md,
"Reference libraries from the package registries").

Usage: python grpc_client_check.py --address 127.0.0.1:50051 --stubs DIR
(DIR holds the modules generated from proto/apportion/v1/apportion.proto).
Prints one line per check and, last, "grpcio: N passed, M failed".
"""

import argparse
import sys

import grpc
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc

TIMEOUT = 10.0
results = []


def check(name, condition, detail=""):
    results.append(bool(condition))
    print(f"{'ok  ' if condition else 'FAIL'} {name}{': ' + detail if detail and not condition else ''}")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--address", required=True)
    parser.add_argument("--stubs", required=True)
    args = parser.parse_args()
    sys.path.insert(0, args.stubs)
    from apportion.v1 import apportion_pb2 as pb, apportion_pb2_grpc as rpc

    channel = grpc.insecure_channel(args.address)
    registry = rpc.RegistryStub(channel)
    attributions = rpc.AttributionsStub(channel)
    diagnostics = rpc.DiagnosticsStub(channel)
    monitoring = rpc.MonitoringStub(channel)

    health = health_pb2_grpc.HealthStub(channel).Check(health_pb2.HealthCheckRequest(service=""), timeout=TIMEOUT)
    check("health reports SERVING", health.status == health_pb2.HealthCheckResponse.SERVING)

    reflection = reflection_pb2_grpc.ServerReflectionStub(channel)
    answers = reflection.ServerReflectionInfo(iter([reflection_pb2.ServerReflectionRequest(list_services="")]), timeout=TIMEOUT)
    names = {s.name for answer in answers for s in answer.list_services_response.service}
    check("reflection lists the API",
          {"apportion.v1.Registry", "apportion.v1.Attributions", "apportion.v1.Monitoring"} <= names, str(names))

    echo = diagnostics.Echo(pb.EchoRequest(payload=b"ping"), timeout=TIMEOUT)
    check("echo returns its payload", echo.payload == b"ping")

    # A linear model with a logistic link; features 2 and 3 form one group.
    weights, intercept = [0.8, -1.2, 0.5, 0.3], 0.1
    background = [[(r * 7 + c * 3) % 5 - 2.0 for c in range(4)] for r in range(20)]
    features = [pb.Feature(name="income"), pb.Feature(name="rent"),
                pb.Feature(name="late_a", group="payments"), pb.Feature(name="late_b", group="payments")]
    matrix = pb.Matrix(rows=20, cols=4, values=[v for row in background for v in row])
    info = registry.RegisterModel(pb.RegisterModelRequest(
        model_id="py-linear", features=features, linear=pb.LinearModel(weights=weights, intercept=intercept),
        link=pb.LINK_LOGISTIC, background=matrix, description="grpcio check"), timeout=TIMEOUT)
    check("register a linear model", info.version == 1 and info.checksum, str(info))

    # One stump on feature 0 at 0.5: left leaf -1, right leaf 1.
    stump = pb.Tree(feature=[0, -1, -1], threshold=[0.5, 0, 0], left=[1, -1, -1], right=[2, -1, -1],
                    value=[0, -1.0, 1.0], missing_left=[True, False, False])
    trees = registry.RegisterModel(pb.RegisterModelRequest(
        model_id="py-trees", features=features, trees=pb.TreeEnsemble(trees=[stump], base_score=0.2),
        link=pb.LINK_IDENTITY, background=matrix), timeout=TIMEOUT)
    check("register a tree ensemble", trees.version == 1)

    got = registry.GetModel(pb.GetModelRequest(model_id="py-linear", version=0), timeout=TIMEOUT)
    check("get the latest version", got.checksum == info.checksum)
    listed = registry.ListModels(pb.ListModelsRequest(), timeout=TIMEOUT)
    check("list both models", {m.model_id for m in listed.models} >= {"py-linear", "py-trees"})

    x = [1.5, -0.5, 2.0, 1.0]
    explained = attributions.Explain(pb.ExplainRequest(model_id="py-linear", instance=x), timeout=TIMEOUT)
    # Closed form for a linear model under marginal removal of the raw output:
    # phi_i = w_i (x_i - mean_background x_i), summed over a group's members
    # ("A unified approach to interpreting model predictions", NeurIPS 2017).
    means = [sum(row[c] for row in background) / 20 for c in range(4)]
    phi = [w * (xi - m) for w, xi, m in zip(weights, x, means)]
    expected = [phi[0], phi[1], phi[2] + phi[3]]
    values = [a.value for a in explained.attributions]
    check("linear closed form over the wire",
          [a.name for a in explained.attributions] == ["income", "rent", "payments"]
          and all(abs(v - e) < 1e-9 for v, e in zip(values, expected)), f"{values} vs {expected}")

    exact = attributions.Explain(pb.ExplainRequest(
        model_id="py-linear", instance=x, target=pb.TARGET_PROBABILITY, summary=pb.SUMMARY_SHAPLEY,
        estimator=pb.ESTIMATOR_EXACT, seed=3), timeout=TIMEOUT)
    total = sum(a.value for a in exact.attributions)
    # Efficiency of Shapley values ("A value for n-person games", 1953).
    check("exact Shapley values are efficient", abs(total - (exact.value_full - exact.value_empty)) < 1e-9
          and exact.converged, f"{total} vs {exact.value_full - exact.value_empty}")

    # The two answers above are in the drift windows (both in the current
    # one unless an hour boundary fell between them); too few to flag.
    drift = monitoring.AttributionDrift(pb.AttributionDriftRequest(model_id="py-linear"), timeout=TIMEOUT)
    check("drift counts the answers given",
          [p.name for p in drift.players] == ["income", "rent", "payments"]
          and all(p.recent_count + p.reference_count == 2 and p.recent_count >= 1 and not p.shifted
                  for p in drift.players),
          str(drift))

    tree_answer = attributions.Explain(pb.ExplainRequest(model_id="py-trees", instance=x), timeout=TIMEOUT)
    check("tree model uses the exact tree algorithm", tree_answer.estimator_used == pb.ESTIMATOR_TREE_EXACT)

    try:
        attributions.Explain(pb.ExplainRequest(model_id="py-linear", instance=[1.0, 2.0]), timeout=TIMEOUT)
        check("short instance is refused", False, "no error")
    except grpc.RpcError as err:
        check("short instance is INVALID_ARGUMENT naming the field",
              err.code() == grpc.StatusCode.INVALID_ARGUMENT and "instance" in err.details(), err.details())
    try:
        registry.GetModel(pb.GetModelRequest(model_id="nobody"), timeout=TIMEOUT)
        check("unknown model is refused", False, "no error")
    except grpc.RpcError as err:
        check("unknown model is NOT_FOUND", err.code() == grpc.StatusCode.NOT_FOUND, str(err.code()))

    deleted = registry.DeleteModel(pb.DeleteModelRequest(model_id="py-trees", version=0), timeout=TIMEOUT)
    check("delete a model", deleted.deleted == 1)
    listed = registry.ListModels(pb.ListModelsRequest(), timeout=TIMEOUT)
    check("the deleted model is gone", "py-trees" not in {m.model_id for m in listed.models})

    passed = sum(results)
    print(f"grpcio: {passed} passed, {len(results) - passed} failed")
    return 0 if passed == len(results) else 1


if __name__ == "__main__":
    sys.exit(main())
