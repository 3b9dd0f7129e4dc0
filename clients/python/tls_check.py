"""TLS and mutual TLS handshakes of the real server with Python grpcio, whose
TLS stack (BoringSSL inside gRPC core) is independent of the server's
rustls (shared/TESTING.md, "Reference libraries from the package
registries"; issue 12's checks).

Certificates are made here with the `cryptography` package: a CA, a server
certificate for localhost and 127.0.0.1, a client CA with a client
certificate, and a stranger CA with its own client certificate. Two servers
are started: one with TLS, one with mutual TLS (and a token file, for the
client package's tests). Then:

- grpcio trusting the CA calls the TLS server (Echo, Explain);
- a plaintext grpcio channel, and one trusting another CA, are refused;
- the plaintext health listener answers SERVING;
- under mutual TLS, a client without a certificate and one with a
  certificate from another CA are refused, one with a good certificate is
  answered;
- the client package's tests (clients/python/tests) run against the mutual
  TLS server with the certificate, the key and a token.

Usage: python tls_check.py --binary PATH --stubs DIR [--skip-package-tests]
Prints one line per check and, last, "tls: N passed, M failed".
"""

import argparse
import datetime
import hashlib
import ipaddress
import os
import pathlib
import shutil
import socket
import subprocess
import sys
import tempfile
import time

import grpc
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID
from grpc_health.v1 import health_pb2, health_pb2_grpc

TIMEOUT = 10.0
TOKEN = "tls-check-admin-token"
results = []


def check(name, condition, detail=""):
    results.append(bool(condition))
    print(f"{'ok  ' if condition else 'FAIL'} {name}{': ' + detail if detail and not condition else ''}")


def pem_key(key):
    return key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                             serialization.NoEncryption())


def authority(name):
    """A self-signed CA certificate (RFC 5280, section 4.2.1.9: basic
    constraints cA=true; 4.2.1.3: keyCertSign)."""
    key = ec.generate_private_key(ec.SECP256R1())
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)])
    now = datetime.datetime.now(datetime.timezone.utc)
    cert = (x509.CertificateBuilder().subject_name(subject).issuer_name(subject).public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - datetime.timedelta(minutes=5)).not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .add_extension(x509.KeyUsage(digital_signature=False, content_commitment=False, key_encipherment=False,
                                         data_encipherment=False, key_agreement=False, key_cert_sign=True,
                                         crl_sign=True, encipher_only=False, decipher_only=False), critical=True)
            .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
            .sign(key, hashes.SHA256()))
    return cert, key


def leaf(ca, name, server):
    """A certificate signed by `ca`: for a server, with localhost and
    127.0.0.1 as subject alternative names (RFC 5280, section 4.2.1.6) and
    the serverAuth purpose; for a client, clientAuth (section 4.2.1.12)."""
    ca_cert, ca_key = ca
    key = ec.generate_private_key(ec.SECP256R1())
    now = datetime.datetime.now(datetime.timezone.utc)
    builder = (x509.CertificateBuilder()
               .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)]))
               .issuer_name(ca_cert.subject).public_key(key.public_key())
               .serial_number(x509.random_serial_number())
               .not_valid_before(now - datetime.timedelta(minutes=5)).not_valid_after(now + datetime.timedelta(days=1))
               .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
               .add_extension(x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()), critical=False))
    if server:
        builder = builder.add_extension(x509.SubjectAlternativeName(
            [x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), critical=False)
        builder = builder.add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH]), critical=False)
    else:
        builder = builder.add_extension(x509.SubjectAlternativeName([x509.DNSName(name)]), critical=False)
        builder = builder.add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.CLIENT_AUTH]), critical=False)
    return builder.sign(ca_key, hashes.SHA256()), key


def write(folder, name, data):
    path = folder / name
    path.write_bytes(data)
    return path


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start(binary, folder, name, extra):
    port, health, metrics = free_port(), free_port(), free_port()
    process = subprocess.Popen([binary, "serve", "--address", f"127.0.0.1:{port}",
                                "--health-address", f"127.0.0.1:{health}",
                                "--metrics-address", f"127.0.0.1:{metrics}",
                                "--data-dir", str(folder / f"registry-{name}"), "--log-filter", "warn", *extra],
                               env={k: v for k, v in os.environ.items() if not k.startswith("APPORTION_")})
    deadline = time.monotonic() + 60
    while True:
        with socket.socket() as s:
            if s.connect_ex(("127.0.0.1", port)) == 0:
                break
        if process.poll() is not None:
            raise SystemExit(f"tls check: the {name} server exited ({process.returncode}) before listening")
        if time.monotonic() > deadline:
            raise SystemExit(f"tls check: the {name} server did not listen within 60 s")
        time.sleep(0.2)
    return process, f"127.0.0.1:{port}", f"127.0.0.1:{health}"


def echo(channel):
    """Echo's payload, or the status code the call failed with."""
    from apportion.v1 import apportion_pb2 as pb, apportion_pb2_grpc as rpc
    try:
        return rpc.DiagnosticsStub(channel).Echo(pb.EchoRequest(payload=b"tls"), timeout=TIMEOUT).payload
    except grpc.RpcError as error:
        return error.code()
    finally:
        channel.close()


def secure(address, ca, cert=None, key=None):
    return grpc.secure_channel(address, grpc.ssl_channel_credentials(root_certificates=ca, private_key=key,
                                                                      certificate_chain=cert))


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--binary", required=True)
    parser.add_argument("--stubs", required=True)
    parser.add_argument("--skip-package-tests", action="store_true")
    args = parser.parse_args()
    sys.path.insert(0, args.stubs)
    from apportion.v1 import apportion_pb2 as pb, apportion_pb2_grpc as rpc

    folder = pathlib.Path(tempfile.mkdtemp(prefix="apportion-tls-check-"))
    ca, clients, stranger = authority("tls check CA"), authority("tls check client CA"), authority("stranger CA")
    ca_pem = ca[0].public_bytes(serialization.Encoding.PEM)
    server_cert, server_key = leaf(ca, "tls check server", server=True)
    client_cert, client_key = leaf(clients, "client.tls-check.test", server=False)
    foreign_cert, foreign_key = leaf(stranger, "foreign.tls-check.test", server=False)
    pem = lambda cert: cert.public_bytes(serialization.Encoding.PEM)  # noqa: E731
    files = {
        "ca.crt": ca_pem, "server.crt": pem(server_cert), "server.key": pem_key(server_key),
        "clients.crt": pem(clients[0]), "client.crt": pem(client_cert), "client.key": pem_key(client_key),
    }
    paths = {name: write(folder, name, data) for name, data in files.items()}
    tokens = write(folder, "tokens", f"sha256:{hashlib.sha256(TOKEN.encode()).hexdigest()} admin tls-check\n".encode())
    tls_flags = ["--tls-cert-file", str(paths["server.crt"]), "--tls-key-file", str(paths["server.key"])]

    servers = []
    try:
        tls_server, tls_address, tls_health = start(args.binary, folder, "tls", tls_flags)
        servers.append(tls_server)
        mutual_server, mutual_address, _ = start(
            args.binary, folder, "mutual", tls_flags + ["--tls-client-ca-file", str(paths["clients.crt"]),
                                                        "--tokens-file", str(tokens)])
        servers.append(mutual_server)

        answer = echo(secure(tls_address, ca_pem))
        check("grpcio trusting the CA is answered over TLS", answer == b"tls", str(answer))
        channel = secure(tls_address, ca_pem)
        registry, attributions = rpc.RegistryStub(channel), rpc.AttributionsStub(channel)
        registry.RegisterModel(pb.RegisterModelRequest(
            model_id="tls-linear", features=[pb.Feature(name="a"), pb.Feature(name="b")],
            linear=pb.LinearModel(weights=[2.0, -1.0], intercept=0.0),
            background=pb.Matrix(rows=2, cols=2, values=[0.0, 0.0, 2.0, 4.0])), timeout=TIMEOUT)
        explained = attributions.Explain(pb.ExplainRequest(model_id="tls-linear", instance=[3.0, 1.0],
                                                           estimator=pb.ESTIMATOR_LINEAR_EXACT), timeout=TIMEOUT)
        # The linear closed form, phi_i = w_i (x_i - mean_bg x_i) ("A unified
        # approach to interpreting model predictions", NeurIPS 2017):
        # 2 (3 - 1) = 4 and -1 (1 - 2) = 1.
        values = [a.value for a in explained.attributions]
        check("an Explain over TLS equals the linear closed form",
              all(abs(v - e) < 1e-12 for v, e in zip(values, [4.0, 1.0])) and len(values) == 2, str(values))
        channel.close()

        answer = echo(grpc.insecure_channel(tls_address))
        check("a plaintext grpcio channel to the TLS port is refused", answer == grpc.StatusCode.UNAVAILABLE,
              str(answer))
        answer = echo(secure(tls_address, stranger[0].public_bytes(serialization.Encoding.PEM)))
        check("grpcio trusting another CA refuses the server", answer == grpc.StatusCode.UNAVAILABLE, str(answer))

        # The client package's own TLS options: the CA as a path, and the
        # name to check in place of the address's IP.
        from apportion_client import Client
        with Client(tls_address, timeout=TIMEOUT, root_certificates=paths["ca.crt"], server_name="localhost") as client:
            listed = [m.model_id for m in client.models()]
        check("the client package over TLS, checking the name localhost", listed == ["tls-linear"], str(listed))
        try:
            with Client(tls_address, timeout=TIMEOUT, root_certificates=paths["ca.crt"],
                        server_name="elsewhere.test") as client:
                client.models()
            refused = None
        except grpc.RpcError as error:
            refused = error.code()
        check("the client package refuses a certificate without the name it checks",
              refused == grpc.StatusCode.UNAVAILABLE, str(refused))

        health_channel = grpc.insecure_channel(tls_health)
        status = health_pb2_grpc.HealthStub(health_channel).Check(health_pb2.HealthCheckRequest(service=""),
                                                                   timeout=TIMEOUT).status
        health_channel.close()
        check("the plaintext health listener answers SERVING", status == health_pb2.HealthCheckResponse.SERVING,
              str(status))

        answer = echo(secure(mutual_address, ca_pem))
        check("mutual TLS refuses a client without a certificate", answer == grpc.StatusCode.UNAVAILABLE,
              str(answer))
        answer = echo(secure(mutual_address, ca_pem, pem(foreign_cert), pem_key(foreign_key)))
        check("mutual TLS refuses a certificate from another CA", answer == grpc.StatusCode.UNAVAILABLE, str(answer))
        # The handshake succeeds; the call then needs a token (UNAUTHENTICATED
        # without one), so a good certificate shows as anything but
        # UNAVAILABLE here.
        answer = echo(secure(mutual_address, ca_pem, files["client.crt"], files["client.key"]))
        check("mutual TLS admits a certificate from its client CA (the call then needs a token)",
              answer == grpc.StatusCode.UNAUTHENTICATED, str(answer))

        if not args.skip_package_tests:
            env = dict(os.environ, APPORTION_ADDRESS=mutual_address, APPORTION_TLS_CA=str(paths["ca.crt"]),
                       APPORTION_TLS_CERT=str(paths["client.crt"]), APPORTION_TLS_KEY=str(paths["client.key"]),
                       APPORTION_TOKEN=TOKEN)
            here = pathlib.Path(__file__).resolve().parent
            code = subprocess.call([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                                    str(here / "tests")], env=env)
            check("the client package's tests pass over mutual TLS with a token", code == 0, f"pytest exit {code}")
    finally:
        for server in servers:
            server.terminate()
            try:
                server.wait(timeout=30)
            except subprocess.TimeoutExpired:
                server.kill()
        shutil.rmtree(folder, ignore_errors=True)

    passed = sum(results)
    print(f"tls: {passed} passed, {len(results) - passed} failed")
    return 0 if passed == len(results) else 1


if __name__ == "__main__":
    sys.exit(main())
