"""CURVE: an allowed key is served; an unknown key or no key gets nothing and is logged."""

from __future__ import annotations

import pytest

from autotune.wire.bus import CurveClientKeys
from autotune.errors import ConfigError, RigTimeout


def _curve_server(start_server, files):
    return start_server("--curve-secret-key", str(files.server_secret), "--curve-allowed-dir", str(files.allowed_dir))


def test_allowed_client_key_is_served(start_server, make_client, curve_files):
    """A client whose public key is in the allowed folder completes a round trip."""
    server = _curve_server(start_server, curve_files)
    keys = CurveClientKeys.load(curve_files.client_secret, curve_files.server_public)
    client = make_client(server.endpoint, timeout_s=2.0, retries=1, curve=keys)
    assert client.status().shots_total == 0


def test_unknown_client_key_gets_no_reply_and_is_logged(start_server, make_client, curve_files):
    """A client with a key outside the allowed folder times out, and the server logs its public key."""
    server = _curve_server(start_server, curve_files)
    keys = CurveClientKeys.load(curve_files.stranger_secret, curve_files.server_public)
    client = make_client(server.endpoint, timeout_s=0.3, retries=1, curve=keys)
    with pytest.raises(RigTimeout):
        client.status()
    refused = server.wait_for_event("curve_client_refused")
    assert refused and refused[0]["client_key"] == keys.public.decode()


def test_plain_client_gets_no_reply_and_is_logged(start_server, make_client, curve_files):
    """A client without keys gets nothing from a CURVE server, which logs the failed handshake."""
    server = _curve_server(start_server, curve_files)
    client = make_client(server.endpoint, timeout_s=0.3, retries=1)
    with pytest.raises(RigTimeout):
        client.status()
    assert server.wait_for_event("curve_handshake_refused")


def test_missing_client_key_file_refuses_to_start(curve_files):
    """Configured keys that cannot be loaded raise ConfigError naming the file (no plain-text fallback)."""
    missing = curve_files.client_secret.with_name("absent.key_secret")
    with pytest.raises(ConfigError) as info:
        CurveClientKeys.load(missing, curve_files.server_public)
    assert info.value.file == str(missing)


def test_public_only_file_is_not_a_client_secret(curve_files):
    """A public certificate given as the client's secret file is refused."""
    with pytest.raises(ConfigError, match="secret key"):
        CurveClientKeys.load(curve_files.server_public, curve_files.server_public)


def test_server_with_missing_secret_key_refuses_to_start(start_server, curve_files):
    """A server whose secret key file is missing exits with status 2 and never listens."""
    missing = curve_files.server_secret.with_name("absent.key_secret")
    server = start_server("--curve-secret-key", str(missing), "--curve-allowed-dir", str(curve_files.allowed_dir),
                          wait=False)
    assert server.process.wait(timeout=30) == 2
    assert not server.ready_path.exists()
    assert server.wait_for_event("server_refused_to_start")


def test_curve_client_never_falls_back_to_plain_text(start_server, make_client, curve_files):
    """A client with keys gets no reply from a plain-text server instead of talking in the clear."""
    server = start_server()
    keys = CurveClientKeys.load(curve_files.client_secret, curve_files.server_public)
    client = make_client(server.endpoint, timeout_s=0.3, retries=1, curve=keys)
    with pytest.raises(RigTimeout):
        client.status()
