"""ONNX models against independent references, over real gRPC.

Two ONNX graphs are registered with a running apportion server:

* a small neural network written with onnx.helper (MatMul, Add, Relu), and
* a scikit-learn RandomForestClassifier exported by skl2onnx
  (TreeEnsembleClassifier, probabilities of the positive class), which the
  server imports as native trees.

For each, the server's predictions (value_full under fixed removal at the
instance itself) must equal onnxruntime's, and the server's exact Shapley
values under marginal removal must equal the Shapley values computed here
from their definition ("A value for n-person games", Contributions to the
Theory of Games II, 1953), with onnxruntime evaluating every
coalition's rows. The random forest's probabilities are also checked
against scikit-learn's own predict_proba. Tolerances allow for float32
arithmetic (the graphs take float input).

Usage: onnx_reference_check.py --address HOST:PORT --stubs DIR
"""

import argparse
import itertools
import math
import sys

import grpc
import numpy as np
import onnx
import onnxruntime
from onnx import TensorProto, helper, numpy_helper
from skl2onnx import to_onnx
from sklearn.ensemble import RandomForestClassifier

FAILURES = []


def check(name, condition, detail=""):
    print(("ok   " if condition else "FAIL ") + name + ("" if condition else f": {detail}"))
    if not condition:
        FAILURES.append(name)


def network_graph(rng, features, hidden):
    """y = W2 · relu(W1 · x + b1) + b2, float32, batch dimension N."""
    w1 = rng.normal(size=(features, hidden)).astype(np.float32)
    b1 = rng.normal(size=(hidden,)).astype(np.float32)
    w2 = rng.normal(size=(hidden, 1)).astype(np.float32)
    b2 = rng.normal(size=(1,)).astype(np.float32)
    graph = helper.make_graph(
        [
            helper.make_node("MatMul", ["x", "w1"], ["h0"]),
            helper.make_node("Add", ["h0", "b1"], ["h1"]),
            helper.make_node("Relu", ["h1"], ["h"]),
            helper.make_node("MatMul", ["h", "w2"], ["y0"]),
            helper.make_node("Add", ["y0", "b2"], ["y"]),
        ],
        "network",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", features])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 1])],
        [numpy_helper.from_array(a, n) for a, n in [(w1, "w1"), (b1, "b1"), (w2, "w2"), (b2, "b2")]],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


def forest_graph(rng, features):
    """A random forest on a synthetic rule, exported with probabilities as a plain matrix."""
    x = rng.normal(size=(400, features))
    y = (x[:, 0] + 0.5 * x[:, 1] * x[:, 2] + 0.3 * rng.normal(size=400) > 0).astype(int)
    forest = RandomForestClassifier(n_estimators=12, max_depth=4, random_state=0).fit(x, y)
    exported = to_onnx(forest, x[:1].astype(np.float32), options={id(forest): {"zipmap": False}},
                       target_opset={"": 13, "ai.onnx.ml": 3})
    return forest, exported.SerializeToString()


def runtime_predict(session, output, column, rows):
    got = session.run([output], {session.get_inputs()[0].name: rows.astype(np.float32)})[0]
    return got.reshape(len(rows), -1)[:, column].astype(np.float64)


def shapley_by_definition(predict, x, background):
    """Exact Shapley values of v(S) = mean over background rows of f(x_S, b_rest)."""
    p = len(x)
    cache = {}

    def value(coalition):
        if coalition not in cache:
            rows = background.copy()
            for j in coalition:
                rows[:, j] = x[j]
            cache[coalition] = predict(rows).mean()
        return cache[coalition]

    phi = np.zeros(p)
    for j in range(p):
        others = [k for k in range(p) if k != j]
        for size in range(p):
            weight = math.factorial(size) * math.factorial(p - size - 1) / math.factorial(p)
            for subset in itertools.combinations(others, size):
                with_j = tuple(sorted(subset + (j,)))
                phi[j] += weight * (value(with_j) - value(tuple(subset)))
    return phi


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--address", required=True)
    parser.add_argument("--stubs", required=True)
    args = parser.parse_args()
    sys.path.insert(0, args.stubs)
    from apportion.v1 import apportion_pb2 as pb
    from apportion.v1 import apportion_pb2_grpc as rpc

    channel = grpc.insecure_channel(args.address)
    registry = rpc.RegistryStub(channel)
    attributions = rpc.AttributionsStub(channel)
    rng = np.random.default_rng(20261202)

    features = 5
    background = rng.normal(size=(24, features))
    instances = rng.normal(size=(6, features))
    forest, forest_bytes = forest_graph(rng, features)
    # The network runs in the graph runtime; the forest, one ai.onnx.ml
    # operator, is imported as native trees.
    cases = [
        ("py-onnx-network", network_graph(rng, features, 8), "", 0, "onnx-graph"),
        ("py-onnx-forest", forest_bytes, "probabilities", 1, "trees"),
    ]
    for model_id, graph, output, column, kind in cases:
        info = registry.RegisterModel(pb.RegisterModelRequest(
            model_id=model_id,
            features=[pb.Feature(name=f"x{j}") for j in range(features)],
            onnx=graph,
            onnx_output=output,
            onnx_output_column=column,
            background=pb.Matrix(rows=len(background), cols=features, values=background.ravel().tolist()),
        ))
        check(f"{model_id}: registered as {kind}", info.model_kind == kind, str(info))
        session = onnxruntime.InferenceSession(graph, providers=["CPUExecutionProvider"])
        output_name = output or session.get_outputs()[0].name

        def predict(rows):
            return runtime_predict(session, output_name, column, rows)

        worst_value, worst_shapley = 0.0, 0.0
        for x in instances:
            at_x = attributions.Explain(pb.ExplainRequest(
                model_id=model_id, instance=x.tolist(), removal=pb.REMOVAL_FIXED, fixed_values=x.tolist()))
            worst_value = max(worst_value, abs(at_x.value_full - predict(x[None, :])[0]))
            exact = attributions.Explain(pb.ExplainRequest(
                model_id=model_id, instance=x.tolist(), removal=pb.REMOVAL_MARGINAL, estimator=pb.ESTIMATOR_EXACT))
            reference = shapley_by_definition(predict, x, background)
            got = np.array([a.value for a in exact.attributions])
            worst_shapley = max(worst_shapley, float(np.max(np.abs(got - reference))))
        check(f"{model_id}: predictions equal onnxruntime's", worst_value < 1e-5, f"worst {worst_value:.2e}")
        check(f"{model_id}: exact Shapley values equal the definition evaluated by onnxruntime",
              worst_shapley < 1e-5, f"worst {worst_shapley:.2e}")
        print(f"     worst differences: prediction {worst_value:.1e}, Shapley value {worst_shapley:.1e}")

    # The exported forest is the fitted forest (float32 thresholds aside).
    session = onnxruntime.InferenceSession(forest_bytes, providers=["CPUExecutionProvider"])
    exported = runtime_predict(session, "probabilities", 1, instances)
    fitted = forest.predict_proba(instances)[:, 1]
    check("the exported forest predicts as scikit-learn does", np.max(np.abs(exported - fitted)) < 1e-5,
          f"{exported} vs {fitted}")

    print(f"onnx reference check: {len(FAILURES)} failed" if FAILURES else "onnx reference check: all passed")
    sys.exit(1 if FAILURES else 0)


if __name__ == "__main__":
    main()
