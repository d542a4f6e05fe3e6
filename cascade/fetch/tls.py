"""The fetcher's TLS client context, built without reading the environment.

``ssl.create_default_context()`` (and httpx's ``create_ssl_context``, which calls it) writes
TLS session secrets to the file ``SSLKEYLOGFILE`` names, and OpenSSL's default verify paths
(``load_default_certs``, ``set_default_verify_paths``) follow ``SSL_CERT_FILE`` and
``SSL_CERT_DIR``. A sandbox must not change what it trusts, or leak what it read, because of
a variable set by whoever started the process. This context is built from
``ssl.SSLContext`` directly, trusts certifi's CA bundle by explicit path, and never sets a
key log file. docs/fetching.md lists every variable the fetcher ignores.
"""

from __future__ import annotations

import ssl

import certifi

__all__ = ["sandbox_ssl_context"]


def sandbox_ssl_context(cafile: str | None = None, cadata: str | bytes | None = None
                        ) -> ssl.SSLContext:
    """A TLS client context for the sandboxed fetcher: certificate and host name always
    checked, TLS 1.2 at least, CAs from ``certifi.where()`` (or, for tests, only from
    ``cafile`` / ``cadata``), no key log file, no environment variable read.

    Raises ``RuntimeError`` if the ``ssl`` module ever comes back with a key log file set
    (it would mean session secrets written to disk)."""
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    context.check_hostname = True
    context.verify_mode = ssl.CERT_REQUIRED
    context.minimum_version = ssl.TLSVersion.TLSv1_2
    if cafile is None and cadata is None:
        context.load_verify_locations(cafile=certifi.where())
    else:
        context.load_verify_locations(cafile=cafile, cadata=cadata)
    if hasattr(context, "keylog_filename"):
        # setting None also clears any key log callback set on the OpenSSL context
        context.keylog_filename = None
        if context.keylog_filename is not None:
            raise RuntimeError("the TLS context has a key log file set; refusing to use it")
    return context
