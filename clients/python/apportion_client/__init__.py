"""A typed client for the apportion attribution service.

    from apportion_client import Client

    client = Client("127.0.0.1:50051")                # plaintext (a server started with --plaintext)
    client = Client("apportion.internal:50051", root_certificates="ca.crt",
                    certificate_chain="client.crt", private_key="client.key",  # mutual TLS
                    token=os.environ["APPORTION_TOKEN"])                        # bearer token
    client.register_file("screening.json")            # the CLI's model file format
    answer = client.explain("screening", [3100.0, 0.31, 2.0], target="probability")
    for a in answer.attributions:
        print(a.name, a.value, a.std_error)
    frame = client.explain_frame("screening", applicants)   # pandas in, pandas out

Results are plain dataclasses; options take the API's enum names in lower
case (``removal="conditional_gaussian"``, ``target="probability"``,
``estimator="auto"``). Errors are ``grpc.RpcError`` with the server's status,
whose message names the field at fault.
"""

from __future__ import annotations

import json
import math
import pathlib
from dataclasses import dataclass, field
from typing import Any, Iterable, Sequence

import grpc

from .v1 import apportion_pb2 as pb
from .v1 import apportion_pb2_grpc as rpc

__all__ = ["Attribution", "Client", "Explanation", "ItemError", "ModelInfo", "Reason"]


@dataclass(frozen=True)
class ModelInfo:
    model_id: str
    version: int
    model_kind: str
    features: list[str]
    players: list[str]
    link: str
    background_rows: int
    checksum: str
    import_format: str = ""
    import_objective: str = ""
    warnings: list[str] = field(default_factory=list)

    @staticmethod
    def from_message(m: Any) -> "ModelInfo":
        return ModelInfo(
            model_id=m.model_id,
            version=m.version,
            model_kind=m.model_kind,
            features=[f.name for f in m.features],
            players=list(m.players),
            link=pb.Link.Name(m.link).removeprefix("LINK_").lower(),
            background_rows=m.background_rows,
            checksum=m.checksum,
            import_format=m.import_format,
            import_objective=m.import_objective,
            warnings=list(m.warnings),
        )


@dataclass(frozen=True)
class Attribution:
    name: str
    value: float
    std_error: float


@dataclass(frozen=True)
class Reason:
    name: str
    reason_code: str
    statement: str
    weight: float
    in_list_probability: float


@dataclass(frozen=True)
class Explanation:
    model_id: str
    version: int
    request_id: str
    value_full: float
    value_empty: float
    attributions: list[Attribution]
    estimator: str
    plan_reason: str
    converged: bool
    coalitions_evaluated: int
    reasons: list[Reason]
    reasons_certain: bool
    # The std errors' norm over the values' (0 for exact answers).
    relative_error: float
    # The probability that the listed reasons are the top ones.
    reasons_set_probability: float
    # When the effort was aimed: what the boundary phase computed, and for whom.
    boundary_evaluations: int
    boundary_players: list[str]

    @staticmethod
    def from_message(m: Any) -> "Explanation":
        return Explanation(
            model_id=m.model_id,
            version=m.version,
            request_id=m.request_id,
            value_full=m.value_full,
            value_empty=m.value_empty,
            attributions=[Attribution(a.name, a.value, a.std_error) for a in m.attributions],
            estimator=pb.Estimator.Name(m.estimator_used).removeprefix("ESTIMATOR_").lower(),
            plan_reason=m.plan_reason,
            converged=m.converged,
            coalitions_evaluated=m.coalitions_evaluated,
            reasons=[Reason(r.name, r.reason_code, r.statement, r.weight, r.in_list_probability)
                     for r in m.reasons],
            reasons_certain=m.reasons_certain,
            relative_error=m.relative_error,
            reasons_set_probability=m.reasons_set_probability,
            boundary_evaluations=m.boundary_evaluations,
            boundary_players=list(m.boundary_players),
        )

    def values(self) -> dict[str, float]:
        """Attribution per player, in player order."""
        return {a.name: a.value for a in self.attributions}


class ItemError(Exception):
    """A row of a batch the server refused: its position, status and message."""

    def __init__(self, row: int, code: str, message: str):
        super().__init__(f"row {row}: {code}: {message}")
        self.row, self.code, self.message = row, code, message


def _enum(enum: Any, prefix: str, name: str | None) -> int:
    if name is None:
        return 0
    try:
        return enum.Value(f"{prefix}_{name.upper()}")
    except ValueError:
        known = [n.removeprefix(prefix + "_").lower() for n in enum.keys()]
        raise ValueError(f"{prefix.lower()}: unknown value {name!r}; use one of {known}") from None


def _explain_request(model_id: str, row: Sequence[float], options: dict[str, Any]) -> Any:
    """An ExplainRequest from a row and keyword options named as the API
    names its fields; enums by their lower-case names."""
    options = dict(options)
    request = pb.ExplainRequest(
        model_id=model_id,
        instance=[math.nan if v is None else float(v) for v in row],
        removal=_enum(pb.Removal, "REMOVAL", options.pop("removal", None)),
        target=_enum(pb.Target, "TARGET", options.pop("target", None)),
        summary=_enum(pb.Summary, "SUMMARY", options.pop("summary", None)),
        estimator=_enum(pb.Estimator, "ESTIMATOR", options.pop("estimator", None)),
        reasons_effort=_enum(pb.ReasonsEffort, "REASONS_EFFORT", options.pop("reasons_effort", None)),
    )
    for name, value in options.items():
        if name == "fixed_values":
            request.fixed_values.extend(float(v) for v in value)
        elif name in pb.ExplainRequest.DESCRIPTOR.fields_by_name:
            setattr(request, name, value)
        else:
            raise TypeError(f"unknown option {name!r}")
    return request


def _background(rows: Iterable[Sequence[float | None]]) -> Any:
    rows = [[math.nan if v is None else float(v) for v in row] for row in rows]
    cols = len(rows[0]) if rows else 0
    if any(len(row) != cols for row in rows):
        raise ValueError("background: every row needs the same number of values")
    return pb.Matrix(rows=len(rows), cols=cols, values=[v for row in rows for v in row])


def _pem(value: bytes | str | pathlib.Path | None, name: str) -> bytes | None:
    """PEM bytes as given, or read from a path."""
    if value is None or isinstance(value, bytes):
        return value
    try:
        return pathlib.Path(value).read_bytes()
    except OSError as error:
        raise ValueError(f"{name}: cannot read {value}: {error}") from None


class _Bearer(grpc.UnaryUnaryClientInterceptor, grpc.UnaryStreamClientInterceptor,
              grpc.StreamUnaryClientInterceptor, grpc.StreamStreamClientInterceptor):
    """Adds `authorization: Bearer TOKEN` to every call, on TLS and
    plaintext channels alike (grpcio's call credentials refuse plaintext)."""

    def __init__(self, token: str):
        self._header = ("authorization", f"Bearer {token.strip()}")

    def _with_token(self, details: Any) -> Any:
        metadata = list(details.metadata or []) + [self._header]
        return details._replace(metadata=metadata) if hasattr(details, "_replace") else _Details(details, metadata)

    def intercept_unary_unary(self, continuation, details, request):
        return continuation(self._with_token(details), request)

    def intercept_unary_stream(self, continuation, details, request):
        return continuation(self._with_token(details), request)

    def intercept_stream_unary(self, continuation, details, requests):
        return continuation(self._with_token(details), requests)

    def intercept_stream_stream(self, continuation, details, requests):
        return continuation(self._with_token(details), requests)


class _Details(grpc.ClientCallDetails):
    """grpcio's call details with other metadata (its own type is not a
    named tuple in every version)."""

    def __init__(self, details: Any, metadata: list):
        self.method = details.method
        self.timeout = details.timeout
        self.metadata = metadata
        self.credentials = details.credentials
        self.wait_for_ready = getattr(details, "wait_for_ready", None)
        self.compression = getattr(details, "compression", None)


class Client:
    """One channel to a server; every call takes the client's timeout.

    With ``root_certificates`` (the PEM CA certificates the server's
    certificate must chain to, as bytes or a path) the channel is TLS;
    ``certificate_chain`` and ``private_key`` add a client certificate for
    a server that requires one (mutual TLS); ``server_name`` is the name
    the server's certificate must carry when the address does not say it.
    ``token`` is sent as ``authorization: Bearer TOKEN`` with every call.
    """

    def __init__(self, address: str = "127.0.0.1:50051", timeout: float = 10.0,
                 channel: grpc.Channel | None = None, *,
                 root_certificates: bytes | str | pathlib.Path | None = None,
                 certificate_chain: bytes | str | pathlib.Path | None = None,
                 private_key: bytes | str | pathlib.Path | None = None,
                 server_name: str | None = None,
                 token: str | None = None):
        if (certificate_chain is None) != (private_key is None):
            raise ValueError("certificate_chain and private_key go together (a certificate and its key)")
        if certificate_chain is not None and root_certificates is None:
            raise ValueError("certificate_chain needs root_certificates (the CA that signed the server's certificate)")
        if channel is None:
            if root_certificates is None:
                channel = grpc.insecure_channel(address)
            else:
                credentials = grpc.ssl_channel_credentials(
                    root_certificates=_pem(root_certificates, "root_certificates"),
                    private_key=_pem(private_key, "private_key"),
                    certificate_chain=_pem(certificate_chain, "certificate_chain"))
                options = [("grpc.ssl_target_name_override", server_name)] if server_name else []
                channel = grpc.secure_channel(address, credentials, options=options)
        self._plain_channel = channel
        self.channel = grpc.intercept_channel(channel, _Bearer(token)) if token else channel
        self.timeout = timeout
        self.registry = rpc.RegistryStub(self.channel)
        self.attributions = rpc.AttributionsStub(self.channel)

    def close(self) -> None:
        self._plain_channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *_: Any) -> None:
        self.close()

    def register_file(self, path: str | pathlib.Path, model_id: str | None = None,
                      background: Iterable[Sequence[float | None]] | None = None) -> ModelInfo:
        """Registers a model file in the format `apportion register` reads
        (README, "Scripts and operators"): JSON with model_id, features,
        link, model and background; paths inside it are taken from the
        file's folder."""
        path = pathlib.Path(path)
        spec = json.loads(path.read_text())
        features = [pb.Feature(name=f["name"], group=f.get("group", ""), reason_code=f.get("reason_code", ""),
                               reason_text=f.get("reason_text", "")) for f in spec.get("features", [])]
        request = pb.RegisterModelRequest(
            model_id=model_id or spec.get("model_id", ""),
            features=features,
            link=_enum(pb.Link, "LINK", spec.get("link", "identity")),
            description=spec.get("description", ""),
            background=_background(background if background is not None else spec.get("background", [])),
        )
        model = spec["model"]
        kind = model.get("kind")
        beside = lambda name: (path.parent / model[name]).read_bytes()  # noqa: E731
        if kind == "linear":
            request.linear.CopyFrom(pb.LinearModel(weights=model["weights"], intercept=model.get("intercept", 0.0)))
        elif kind == "trees":
            request.trees.CopyFrom(pb.TreeEnsemble(
                trees=[pb.Tree(**tree) for tree in model["trees"]], base_score=model.get("base_score", 0.0)))
        elif kind == "onnx":
            request.onnx = beside("path")
            request.onnx_output = model.get("output", "")
            request.onnx_output_column = model.get("column", 0)
        elif kind == "xgboost":
            request.xgboost_json = beside("path")
        elif kind == "lightgbm":
            request.lightgbm_text = beside("path")
        else:
            raise ValueError(f"model.kind: unknown kind {kind!r}; use linear, trees, onnx, xgboost or lightgbm")
        if model.get("class_index") is not None:
            request.class_index = model["class_index"]
        return ModelInfo.from_message(self.registry.RegisterModel(request, timeout=self.timeout))

    def models(self) -> list[ModelInfo]:
        answer = self.registry.ListModels(pb.ListModelsRequest(), timeout=self.timeout)
        return [ModelInfo.from_message(m) for m in answer.models]

    def explain(self, model_id: str, row: Sequence[float | None], **options: Any) -> Explanation:
        """One row; options as ExplainRequest names them (budget_ms,
        max_evaluations, tolerance, seed, label, fixed_values, max_reasons,
        …)."""
        request = _explain_request(model_id, row, options)
        return Explanation.from_message(self.attributions.Explain(request, timeout=self.timeout))

    def explain_rows(self, model_id: str, rows: Iterable[Sequence[float | None]],
                     batch_size: int = 1000, **options: Any) -> list[Explanation]:
        """Several rows of one model under one set of options, in order, in
        ExplainBatch calls of at most `batch_size` rows (the server's
        maximum is 1,024 unless configured). A row the server refuses raises
        ItemError, naming the row."""
        shared = _explain_request(model_id, [], options)
        rows = list(rows)
        answers: list[Explanation] = []
        for start in range(0, len(rows), batch_size):
            chunk = rows[start:start + batch_size]
            request = pb.ExplainBatchRequest(request=shared, instances=[
                pb.BatchInstance(instance=[math.nan if v is None else float(v) for v in row]) for row in chunk])
            response = self.attributions.ExplainBatch(request, timeout=self.timeout)
            for item in sorted(response.items, key=lambda item: item.index):
                if item.HasField("error"):
                    raise ItemError(start + item.index, item.error.code_name, item.error.message)
                answers.append(Explanation.from_message(item.explanation))
        return answers

    def explain_frame(self, model_id: str, frame: Any, **options: Any) -> Any:
        """A pandas DataFrame of rows (columns in the model's feature order)
        → a DataFrame with one column per player, indexed like `frame`, and
        the columns value_full, value_empty and estimator."""
        import pandas

        answers = self.explain_rows(model_id, frame.itertuples(index=False, name=None), **options)
        records = []
        for answer in answers:
            record = answer.values()
            record.update(value_full=answer.value_full, value_empty=answer.value_empty, estimator=answer.estimator)
            records.append(record)
        return pandas.DataFrame.from_records(records, index=frame.index)
