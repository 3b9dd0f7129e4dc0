"""The client package against a real server (started by .ci/grpcio-check;
its address in APPORTION_ADDRESS). Reference values are the linear closed
form, phi_i = w_i (x_i - mean_bg x_i) ("A unified approach to interpreting
model predictions", NeurIPS 2017), computed here.

.ci/grpcio-check runs these tests twice: against a plaintext server, and
against one with mutual TLS and bearer tokens, whose CA, client certificate
and key, and token are in APPORTION_TLS_CA, APPORTION_TLS_CERT,
APPORTION_TLS_KEY and APPORTION_TOKEN; the tests of those options are
skipped (and say why) in the plaintext run."""

import json
import math
import os

import grpc
import pandas
import pytest

from apportion_client import Client, ItemError

WEIGHTS = [0.8, -1.1, 0.5]
BACKGROUND = [[1.0, 2.0, 0.0], [3.0, 0.0, 4.0], [2.0, 1.0, 2.0]]


def secure_options():
    """The client's TLS and token options from the environment."""
    options = {}
    for name, variable in [("root_certificates", "APPORTION_TLS_CA"), ("certificate_chain", "APPORTION_TLS_CERT"),
                           ("private_key", "APPORTION_TLS_KEY"), ("token", "APPORTION_TOKEN")]:
        if os.environ.get(variable):
            options[name] = os.environ[variable]
    return options


needs_tls = pytest.mark.skipif(not os.environ.get("APPORTION_TLS_CA"), reason="plaintext run: no APPORTION_TLS_CA")
needs_mutual_tls = pytest.mark.skipif(not os.environ.get("APPORTION_TLS_CERT"),
                                      reason="no client certificate in APPORTION_TLS_CERT")
needs_token = pytest.mark.skipif(not os.environ.get("APPORTION_TOKEN"), reason="no token in APPORTION_TOKEN")


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    address = os.environ["APPORTION_ADDRESS"]
    with Client(address, **secure_options()) as client:
        folder = tmp_path_factory.mktemp("model")
        spec = {
            "model_id": "py-package-linear",
            "features": [{"name": "income", "reason_text": "Income is low"}, {"name": "debt"}, {"name": "tenure"}],
            "model": {"kind": "linear", "weights": WEIGHTS, "intercept": 0.1},
            "background": BACKGROUND,
        }
        (folder / "model.json").write_text(json.dumps(spec))
        client.info = client.register_file(folder / "model.json")
        yield client


def closed_form(row):
    means = [sum(column) / len(column) for column in zip(*BACKGROUND)]
    return [w * (x - m) for w, x, m in zip(WEIGHTS, row, means)]


def test_register_file_reports_the_model(client):
    assert client.info.model_kind == "linear"
    assert client.info.players == ["income", "debt", "tenure"]
    assert any("debt" in w for w in client.info.warnings), "players without a statement are reported"
    assert any(m.model_id == "py-package-linear" for m in client.models())


def test_explain_one_row_equals_the_closed_form(client):
    row = [4.0, 1.0, 3.0]
    answer = client.explain("py-package-linear", row)
    assert answer.estimator == "linear_exact"
    for got, expected in zip(answer.values().values(), closed_form(row)):
        assert math.isclose(got, expected, rel_tol=1e-12, abs_tol=1e-12)
    assert [r.name for r in answer.reasons] == ["income"] or not answer.reasons
    assert answer.relative_error == 0.0 and answer.reasons_set_probability == 1.0, "an exact answer"


def test_a_sampled_answer_aimed_at_its_reasons_reports_its_effort(client, tmp_path):
    # The same features under a logistic link: probabilities are not
    # additive, so permutation sampling has std errors.
    spec = {
        "model_id": "py-package-logistic", "link": "logistic",
        "features": [{"name": "income", "reason_text": "Income is low"}, {"name": "debt"},
                     {"name": "tenure", "reason_text": "Tenure is short"}],
        "model": {"kind": "linear", "weights": WEIGHTS, "intercept": 0.1},
        "background": BACKGROUND,
    }
    (tmp_path / "logistic.json").write_text(json.dumps(spec))
    client.register_file(tmp_path / "logistic.json")
    answer = client.explain("py-package-logistic", [4.0, 1.0, 3.0], estimator="permutation",
                            target="probability", reasons_effort="aimed", max_evaluations=64, seed=3,
                            tolerance=1e-300)
    assert answer.estimator == "permutation"
    assert answer.relative_error > 0.0
    assert answer.boundary_evaluations <= answer.coalitions_evaluated <= 64
    assert set(answer.boundary_players) <= {"income", "tenure"}, "debt has no statement"


def test_a_data_frame_in_and_out(client):
    frame = pandas.DataFrame([[4.0, 1.0, 3.0], [0.0, 2.0, 1.0]], columns=["income", "debt", "tenure"], index=["a", "b"])
    answers = client.explain_frame("py-package-linear", frame)
    assert list(answers.index) == ["a", "b"]
    for key, row in zip(["a", "b"], frame.itertuples(index=False, name=None)):
        expected = closed_form(row)
        assert [answers.loc[key, p] for p in ["income", "debt", "tenure"]] == pytest.approx(expected, abs=1e-12)


def test_bad_input_is_the_server_status_naming_the_field(client):
    with pytest.raises(grpc.RpcError) as error:
        client.explain("py-package-linear", [1.0, 2.0])
    assert error.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert error.value.details().startswith("instance")
    with pytest.raises(ValueError, match="target"):
        client.explain("py-package-linear", [1.0, 2.0, 3.0], target="probabilty")


def test_a_bad_row_in_a_batch_names_the_row(client):
    with pytest.raises(ItemError) as error:
        client.explain_rows("py-package-linear", [[1.0, 2.0, 3.0], [1.0, float("nan"), 3.0]])
    assert error.value.row == 1
    assert error.value.code == "INVALID_ARGUMENT"


@needs_tls
def test_a_plaintext_client_is_refused_by_the_tls_server(client):
    with Client(os.environ["APPORTION_ADDRESS"], timeout=5.0) as plaintext:
        with pytest.raises(grpc.RpcError) as error:
            plaintext.models()
    assert error.value.code() == grpc.StatusCode.UNAVAILABLE


@needs_mutual_tls
def test_mutual_tls_refuses_a_client_without_a_certificate(client):
    options = secure_options()
    options.pop("certificate_chain")
    options.pop("private_key")
    with Client(os.environ["APPORTION_ADDRESS"], timeout=5.0, **options) as anonymous:
        with pytest.raises(grpc.RpcError) as error:
            anonymous.models()
    assert error.value.code() == grpc.StatusCode.UNAVAILABLE


@needs_token
def test_the_token_is_sent_with_every_call(client):
    # Without it the server answers UNAUTHENTICATED (gRPC status codes,
    # grpc.io documentation); with it the same call succeeds.
    assert client.models()
    options = secure_options()
    options.pop("token")
    with Client(os.environ["APPORTION_ADDRESS"], timeout=5.0, **options) as tokenless:
        with pytest.raises(grpc.RpcError) as error:
            tokenless.models()
    assert error.value.code() == grpc.StatusCode.UNAUTHENTICATED
    # So do batches (another RPC through the same channel).
    assert len(client.explain_rows("py-package-linear", [[1.0, 2.0, 3.0]])) == 1


def test_half_a_client_identity_is_refused_before_connecting():
    with pytest.raises(ValueError, match="private_key"):
        Client("127.0.0.1:1", root_certificates=b"x", certificate_chain=b"y")
    with pytest.raises(ValueError, match="root_certificates"):
        Client("127.0.0.1:1", certificate_chain=b"y", private_key=b"z")
