"""The environment does not leak into the sandbox: no TLS key log, no CA bundle, proxy,
netrc or other setting taken from environment variables.

Every server is on 127.0.0.1 with an ephemeral port; the TLS server uses a throwaway trustme
CA. Each control runs the standard library's own defaults under the same environment, to
show the variable really is in effect there, so its absence in the sandbox means something.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import socket
import ssl
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path

import pytest
from hostile_cases import tls_page_server

from cascade.fetch import Fetcher, FetchOutcome, FetchPolicy
from cascade.fetch.tls import sandbox_ssl_context
from cascade.scenario.site_farm import FarmRequest, Reply, SiteFarm

trustme = pytest.importorskip("trustme")

ROOT = Path(__file__).resolve().parent.parent
TLS_HOST = "secure.test"


@pytest.fixture(scope="module")
def ca():
    return trustme.CA()


@contextlib.contextmanager
def tls_server(ca) -> Iterator[int]:
    """A one-page HTTPS server on 127.0.0.1 with a certificate for ``secure.test`` from
    ``ca``; yields its port. Handshakes the client refuses are ignored."""
    server_ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)  # not create_default_context
    ca.issue_cert(TLS_HOST).configure_cert(server_ctx)
    with tls_page_server(server_ctx) as port:
        yield port


# ---------------------------------------------------------------- the TLS context
def test_sandbox_context_checks_certificates_and_keeps_no_key_log() -> None:
    ctx = sandbox_ssl_context()
    assert ctx.verify_mode is ssl.CERT_REQUIRED and ctx.check_hostname
    assert ctx.minimum_version >= ssl.TLSVersion.TLSv1_2
    assert ctx.keylog_filename is None
    assert ctx.get_ca_certs()  # certifi's bundle, loaded by path


_CHILD = textwrap.dedent("""
    import json, os, socket, ssl, sys
    from cascade.fetch.tls import sandbox_ssl_context

    port, cafile = int(sys.argv[1]), sys.argv[2]
    keylog = os.environ["SSLKEYLOGFILE"]

    def handshake(ctx):
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=10) as raw:
                with ctx.wrap_socket(raw, server_hostname="secure.test") as tls:
                    tls.sendall(b"GET / HTTP/1.1\\r\\nHost: secure.test\\r\\n\\r\\n")
                    return tls.recv(65536).split(b"\\r\\n", 1)[0].decode()
        except ssl.SSLCertVerificationError:
            return "refused"

    out = {}
    ctx = sandbox_ssl_context(cafile=cafile)
    out["keylog_filename"] = ctx.keylog_filename
    out["sandbox_with_test_ca"] = handshake(ctx)
    out["sandbox_default"] = handshake(sandbox_ssl_context())
    out["keylog_written_by_sandbox"] = os.path.exists(keylog)
    # controls: the standard library's defaults under the same environment
    out["stdlib_default"] = handshake(ssl.create_default_context())
    out["keylog_written_by_stdlib"] = os.path.exists(keylog)
    print(json.dumps(out))
""")


def test_tls_ignores_sslkeylogfile_and_ca_variables(ca, tmp_path: Path) -> None:
    cafile = tmp_path / "test-ca.pem"
    ca.cert_pem.write_to_path(str(cafile))
    cert_dir = tmp_path / "certs"
    cert_dir.mkdir()
    ca.cert_pem.write_to_path(str(cert_dir / "test-ca.pem"))
    keylog = tmp_path / "keys.log"
    env = dict(os.environ)
    env.update({
        "SSLKEYLOGFILE": str(keylog),  # Python's create_default_context writes secrets here
        "SSL_CERT_FILE": str(cafile),  # OpenSSL's default verify file: the test CA
        "SSL_CERT_DIR": str(cert_dir),  # OpenSSL's default verify directory
        "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH")])),
    })
    with tls_server(ca) as port:
        proc = subprocess.run([sys.executable, "-c", _CHILD, str(port), str(cafile)],
                              env=env, cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["keylog_filename"] is None
    assert out["sandbox_with_test_ca"] == "HTTP/1.1 200 OK"  # a real handshake happened
    # SSL_CERT_FILE names the test CA, yet the sandbox trusts only certifi's bundle
    assert out["sandbox_default"] == "refused"
    assert out["keylog_written_by_sandbox"] is False
    # the controls: the same variables do reach the standard library's default context
    assert out["stdlib_default"] == "HTTP/1.1 200 OK"
    assert out["keylog_written_by_stdlib"] is True


# ---------------------------------------------------------------- proxies, bundles, netrc
@pytest.fixture()
def trap() -> Iterator[socket.socket]:
    """A listening socket the proxy variables point at; a client that used a proxy would
    leave a connection in its backlog."""
    listener = socket.create_server(("127.0.0.1", 0))
    listener.setblocking(False)
    try:
        yield listener
    finally:
        listener.close()


def _connections(listener: socket.socket) -> int:
    count = 0
    while True:
        try:
            conn, _ = listener.accept()
        except BlockingIOError:
            return count
        conn.close()
        count += 1


@pytest.fixture()
def hostile_env(monkeypatch, tmp_path: Path, trap: socket.socket) -> Path:
    """Every variable an HTTP client might read, set to something that would show."""
    proxy = f"http://127.0.0.1:{trap.getsockname()[1]}"
    for name in ("HTTP_PROXY", "HTTPS_PROXY", "ALL_PROXY", "http_proxy", "https_proxy",
                 "all_proxy"):
        monkeypatch.setenv(name, proxy)
    for name in ("NO_PROXY", "no_proxy"):
        monkeypatch.setenv(name, "example.invalid")  # our hosts are not exempted
    missing = str(tmp_path / "no-such-bundle.pem")
    for name in ("REQUESTS_CA_BUNDLE", "CURL_CA_BUNDLE", "SSL_CERT_FILE"):
        monkeypatch.setenv(name, missing)
    monkeypatch.setenv("SSL_CERT_DIR", str(tmp_path / "no-such-dir"))
    netrc = tmp_path / "netrc"
    netrc.write_text("machine site.test login alice password secret\n"
                     f"machine {TLS_HOST} login alice password secret\n"
                     "default login alice password secret\n")
    netrc.chmod(0o600)
    monkeypatch.setenv("NETRC", str(netrc))
    keylog = tmp_path / "keys.log"
    monkeypatch.setenv("SSLKEYLOGFILE", str(keylog))
    return keylog


def test_proxy_bundle_and_netrc_variables_do_not_change_a_fetch(hostile_env: Path,
                                                                trap: socket.socket) -> None:
    seen: list[dict[str, str]] = []

    async def echo(request: FarmRequest) -> Reply:
        seen.append(request.headers)
        return Reply(200, [("Content-Type", "text/html")], b"<p>direct</p>")

    with SiteFarm(extra_routes={"/_env/": echo}) as farm:
        policy = FetchPolicy(ports=(farm.port,), allow_networks=("127.0.0.1/32",),
                             deadline_s=5.0, per_host_delay_s=0.0)

        async def run():
            async with Fetcher(policy, farm.resolver()) as fetcher:
                return await fetcher.fetch(farm.url("site.test", "/_env/page"))

        result = asyncio.run(run())
    assert result.outcome is FetchOutcome.OK, (result.outcome, result.detail)
    assert result.text == "<p>direct</p>"
    assert _connections(trap) == 0  # no proxy was asked
    assert len(seen) == 1
    headers = seen[0]
    # absolute-form request targets and Proxy-* headers are what a proxy client sends
    assert not any(name.startswith("proxy-") for name in headers)
    assert "authorization" not in headers  # NETRC's credentials were not sent
    assert not hostile_env.exists()  # no TLS key log opened


def test_proxy_and_ca_variables_do_not_change_an_https_fetch(hostile_env: Path,
                                                             trap: socket.socket, ca,
                                                             tmp_path: Path) -> None:
    cafile = tmp_path / "test-ca.pem"
    ca.cert_pem.write_to_path(str(cafile))
    with tls_server(ca) as port:
        policy = FetchPolicy(ports=(port,), allow_networks=("127.0.0.1/32",), deadline_s=5.0,
                             obey_robots=False)
        from cascade.fetch.resolver import StaticResolver

        async def run():
            ctx = sandbox_ssl_context(cafile=str(cafile))
            async with Fetcher(policy, StaticResolver({TLS_HOST: ["127.0.0.1"]}),
                               ssl_context=ctx) as fetcher:
                return await fetcher.fetch(f"https://{TLS_HOST}:{port}/")

        result = asyncio.run(run())
    assert result.outcome is FetchOutcome.OK, (result.outcome, result.detail)
    assert result.text == "<p>secure page</p>"
    assert _connections(trap) == 0
    assert not hostile_env.exists()


def test_a_fetcher_builds_its_tls_context_without_the_environment(hostile_env: Path) -> None:
    # SSL_CERT_FILE and friends point at files that do not exist, SSLKEYLOGFILE at a file a
    # default context would create at once: the fetcher's own context reads none of them
    async def run() -> None:
        async with Fetcher(FetchPolicy()):
            pass

    asyncio.run(run())
    assert not hostile_env.exists()
