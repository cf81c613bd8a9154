"""The CURVE keys of a client (ZeroMQ's CurveZMQ): its own pair and the server's public key,
loaded from key files with a clear error."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth

from autotune.errors import ConfigError

__all__ = ["CurveClientKeys"]


@dataclass(frozen=True)
class CurveClientKeys:
    """CURVE keys of a client: its own pair and the server's public key (Z85 bytes).

    Attributes
    ----------
    public, secret : bytes
        The client's key pair.
    server_public : bytes
        The server's public key.
    """

    public: bytes
    secret: bytes
    server_public: bytes

    def __repr__(self) -> str:
        return f"CurveClientKeys(public={self.public!r}, secret=<hidden>, server_public={self.server_public!r})"

    @classmethod
    def load(cls, client_secret_file: str | Path, server_public_file: str | Path) -> CurveClientKeys:
        """Load keys from certificate files written by ``zmq.auth.create_certificates``.

        Parameters
        ----------
        client_secret_file : str or Path
            The client's ``.key_secret`` file (holds both of its keys).
        server_public_file : str or Path
            The server's ``.key`` (public) file.

        Raises
        ------
        ConfigError
            If a file is missing, unreadable, or lacks the key it must hold. There is no
            fallback to plain text.
        """
        public, secret = _load_certificate(client_secret_file, "curve.client_secret_file")
        if secret is None:
            raise ConfigError(str(client_secret_file), "curve.client_secret_file",
                              "a certificate with a secret key", "a public-only certificate")
        server_public, _ = _load_certificate(server_public_file, "curve.server_public_file")
        return cls(public=public, secret=secret, server_public=server_public)


def _load_certificate(path: str | Path, key: str) -> tuple[bytes, bytes | None]:
    try:
        return zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise ConfigError(str(path), key, "a readable ZeroMQ certificate file", f"{type(exc).__name__}: {exc}") from exc
