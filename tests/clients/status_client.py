#!/usr/bin/env python3
"""A client of deeptime's cluster API written with stock gRPC for Python.

It shows that proto/deeptime/cluster/v1/cluster.proto is all another program
needs: no code of ours is imported and none is generated ahead of time. At
start it compiles the proto with grpcio-tools' bundled protoc into a
temporary folder and imports the stubs from there. Then:

  status_client.py --coordinator http://HOST:PORT --token-file FILE
      calls Coordinator.Status and the standard health service's Check
      (grpc.health.v1.Health, for the whole server and for the Coordinator
      service), each with `authorization: Bearer <token>`, and prints one
      JSON object: {"status": {...every JobStatus field, by its proto
      name...}, "health": {"server": "SERVING", "coordinator": "SERVING"}}.

  status_client.py --coordinator URL --token-file FILE --wrong-token
      makes calls that must be refused: Status, Join and the health Check
      with a token that differs from the right one in its last character,
      and Status with no token at all. Prints {"refused": {call: code}} and
      exits 0 only when every one got UNAUTHENTICATED.

Integers are JSON numbers (uint64 included), as `deeptime status --json`
prints them; the decimal strings of the proto stay strings.

Exit codes: 0 done; 1 a call failed (coordinator unreachable, an error
status, a timeout); 2 bad input (usage, URL, token file, proto); 3 a call
that had to be refused with UNAUTHENTICATED was not. Every error is one line
on standard error.

The packages are pinned in tests/requirements.txt (grpcio, grpcio-tools,
grpcio-health-checking, protobuf); tests/api.rs runs this program against a
real coordinator.
"""

import argparse
import importlib
import json
import os
import sys
import tempfile
import urllib.parse

import grpc
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_tools import protoc
from google.protobuf.descriptor import FieldDescriptor

PROTO = "deeptime/cluster/v1/cluster.proto"
# Compiled from its own folder, so the stubs are the top-level modules
# cluster_pb2 and cluster_pb2_grpc (no clash with any installed package
# called deeptime); the proto package stays deeptime.cluster.v1.
DEFAULT_PROTO_ROOT = os.path.normpath(
    os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "proto")
)

EXIT_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_NOT_REFUSED = 3


class Failure(Exception):
    """An error to print in one line, with the exit code it maps to."""

    def __init__(self, code, message):
        super().__init__(message)
        self.code = code


def compile_stubs(proto_root, into):
    """Compiles the cluster proto into `into`; returns (messages, services)."""
    proto = os.path.join(proto_root, PROTO)
    if not os.path.isfile(proto):
        raise Failure(EXIT_BAD_INPUT, f"{proto}: no such proto file (see --proto-root)")
    folder, name = os.path.split(proto)
    # grpcio-tools adds its bundled well-known types to the include path.
    rc = protoc.main(["protoc", f"-I{folder}", f"--python_out={into}", f"--grpc_python_out={into}", name])
    if rc != 0:
        raise Failure(EXIT_BAD_INPUT, f"{proto}: protoc failed with exit code {rc}")
    sys.path.insert(0, into)
    module = name[: -len(".proto")]
    return importlib.import_module(module + "_pb2"), importlib.import_module(module + "_pb2_grpc")


def read_token(path):
    """The token file's one line, trimmed, as the deeptime binary reads it."""
    try:
        with open(path, encoding="ascii") as f:
            token = f.read().strip()
    except (OSError, UnicodeDecodeError) as error:
        raise Failure(EXIT_BAD_INPUT, f"{path}: cannot read the token file: {error}")
    if not token or not all("!" <= c <= "~" for c in token):
        raise Failure(EXIT_BAD_INPUT, f"{path}: the token must be one line of printable ASCII")
    return token


def wrong_token(token):
    """A token of the same length that differs in its last character."""
    return token[:-1] + ("0" if token[-1] != "0" else "1")


def open_channel(url, tls_ca, timeout):
    """A channel to http://HOST:PORT (or https:// with the CA's PEM), ready."""
    parsed = urllib.parse.urlsplit(url)
    if parsed.scheme not in ("http", "https") or not parsed.hostname or not parsed.port:
        raise Failure(EXIT_BAD_INPUT, f"--coordinator {url}: give http://HOST:PORT or https://HOST:PORT")
    target = f"{parsed.hostname}:{parsed.port}"
    if parsed.scheme == "https":
        roots = None
        if tls_ca:
            try:
                with open(tls_ca, "rb") as f:
                    roots = f.read()
            except OSError as error:
                raise Failure(EXIT_BAD_INPUT, f"{tls_ca}: cannot read the CA file: {error}")
        channel = grpc.secure_channel(target, grpc.ssl_channel_credentials(root_certificates=roots))
    else:
        channel = grpc.insecure_channel(target)
    try:
        grpc.channel_ready_future(channel).result(timeout=timeout)
    except grpc.FutureTimeoutError:
        channel.close()
        raise Failure(EXIT_FAILED, f"cannot reach the coordinator at {url} within {timeout:g} s")
    return channel


def to_json(message):
    """Every field of `message` under its proto name, defaults included."""
    out = {}
    for field in message.DESCRIPTOR.fields:
        value = getattr(message, field.name)
        is_message = field.type == FieldDescriptor.TYPE_MESSAGE
        if field.is_repeated:
            out[field.name] = [to_json(v) if is_message else v for v in value]
        elif is_message:
            out[field.name] = to_json(value) if message.HasField(field.name) else None
        elif field.has_presence and not message.HasField(field.name):
            out[field.name] = None  # an optional field left unset
        elif field.type == FieldDescriptor.TYPE_BYTES:
            out[field.name] = value.hex()
        elif field.type == FieldDescriptor.TYPE_ENUM:
            out[field.name] = field.enum_type.values_by_number[value].name
        else:
            out[field.name] = value
    return out


def call(what, url, function, request, metadata, timeout):
    """Makes one call; a failure becomes one line naming the call and code."""
    try:
        return function(request, metadata=metadata, timeout=timeout)
    except grpc.RpcError as error:
        raise Failure(EXIT_FAILED, f"{url}: {what}: {error.code().name}: {error.details()}")


def show_status(channel, url, pb, stubs, token, timeout):
    auth = [("authorization", f"Bearer {token}")]
    coordinator = stubs.CoordinatorStub(channel)
    status = call("Coordinator.Status", url, coordinator.Status, pb.StatusRequest(), auth, timeout)
    health = health_pb2_grpc.HealthStub(channel)
    serving = {}
    service_name = pb.DESCRIPTOR.services_by_name["Coordinator"].full_name
    for key, service in (("server", ""), ("coordinator", service_name)):
        reply = call(
            f"grpc.health.v1.Health.Check({service!r})",
            url,
            health.Check,
            health_pb2.HealthCheckRequest(service=service),
            auth,
            timeout,
        )
        serving[key] = health_pb2.HealthCheckResponse.ServingStatus.Name(reply.status)
    return {"status": to_json(status), "health": serving}


def check_refused(channel, url, pb, stubs, token, timeout):
    wrong = [("authorization", f"Bearer {wrong_token(token)}")]
    coordinator = stubs.CoordinatorStub(channel)
    health = health_pb2_grpc.HealthStub(channel)
    # A Join that got through would add a member for good: the caller can
    # see that in the status afterwards.
    attempts = [
        ("Coordinator.Status", coordinator.Status, pb.StatusRequest(), wrong),
        (
            "Coordinator.Join",
            coordinator.Join,
            pb.JoinRequest(address="http://127.0.0.1:9", memory=1, version="refused"),
            wrong,
        ),
        ("grpc.health.v1.Health.Check", health.Check, health_pb2.HealthCheckRequest(), wrong),
        ("Coordinator.Status without a token", coordinator.Status, pb.StatusRequest(), []),
    ]
    refused = {}
    for what, function, request, metadata in attempts:
        try:
            function(request, metadata=metadata, timeout=timeout)
        except grpc.RpcError as error:
            if error.code() != grpc.StatusCode.UNAUTHENTICATED:
                raise Failure(
                    EXIT_NOT_REFUSED,
                    f"{url}: {what} with a wrong token failed with {error.code().name}, "
                    f"not UNAUTHENTICATED: {error.details()}",
                )
            refused[what] = {"code": error.code().name, "message": error.details()}
            continue
        raise Failure(EXIT_NOT_REFUSED, f"{url}: {what} with a wrong token was accepted")
    return {"refused": refused}


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--coordinator", required=True, help="the coordinator's URL, http://HOST:PORT")
    parser.add_argument("--token-file", required=True, help="the cluster token file")
    parser.add_argument("--wrong-token", action="store_true", help="check that wrong tokens are refused")
    parser.add_argument("--tls-ca", help="the CA (PEM) that signs the coordinator's certificate, for https://")
    parser.add_argument("--timeout", type=float, default=10.0, help="seconds to wait for each call")
    parser.add_argument("--proto-root", default=DEFAULT_PROTO_ROOT, help="the folder that holds deeptime/")
    args = parser.parse_args()
    try:
        token = read_token(args.token_file)
        with tempfile.TemporaryDirectory(prefix="deeptime-stubs-") as into:
            pb, stubs = compile_stubs(args.proto_root, into)
            channel = open_channel(args.coordinator, args.tls_ca, args.timeout)
            with channel:
                check = check_refused if args.wrong_token else show_status
                result = check(channel, args.coordinator, pb, stubs, token, args.timeout)
    except Failure as failure:
        print(f"status_client: {failure}", file=sys.stderr)
        return failure.code
    print(json.dumps(result, sort_keys=False))
    return 0


if __name__ == "__main__":
    sys.exit(main())
