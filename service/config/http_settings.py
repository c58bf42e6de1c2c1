"""Configuration of the HTTP face: ``[http]``, where it listens, over what, and the limits it holds to.

```toml
[http]
host = "0.0.0.0"
port = 8443
tls_cert_file = "/etc/rwls/tls/server.pem"   # the certificate chain, leaf first (PEM)
tls_key_file = "/etc/rwls/tls/server.key"
tls_client_ca_file = ""                      # a CA: every client must present a certificate it signed
allow_plain_http = false                     # true: serve write tokens in clear text beyond loopback (warned)
```

Every limit has a default fit for a plant network and is counted in ``/metrics``; see
:mod:`service.api.connection_limits` (connections, header timeout), :mod:`service.api.throttle`
(guessed tokens) and ``GET /api/v1/events`` (event-stream clients).
"""

from __future__ import annotations

import ipaddress

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = ["HttpConfig", "is_loopback"]


def is_loopback(host: str) -> bool:
    """Whether ``host`` (an address or a name) only listens on this machine."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False                   # a name other than localhost: assume it reaches the network


class HttpConfig(BaseModel):
    """``[http]``: where the REST API and dashboard listen, over TLS or not, and the limits they hold to."""

    # No coercion: ``port = "80"`` is a mistake to report.
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)

    host: str = Field(default="127.0.0.1", min_length=1)
    port: int = Field(default=8080, ge=0, le=65535, description="0 picks a free port")
    cors_origins: tuple[str, ...] = Field(default=(), description="origins allowed cross-site (none: CORS off)")
    max_body_bytes: int = Field(default=65536, ge=1024, le=16 * 1024 * 1024,
                                description="request bodies above this are refused (samples: broker.max_payload_bytes)")
    # TLS (uvicorn's); TLS 1.2 is the oldest version accepted.
    tls_cert_file: str = Field(default="", description="PEM certificate chain; with tls_key_file: serve HTTPS")
    tls_key_file: str = Field(default="", description="PEM private key of tls_cert_file")
    tls_client_ca_file: str = Field(default="", description="PEM CA(s): every client needs a certificate from one")
    allow_plain_http: bool = Field(default=False, description="serve tokens without TLS beyond loopback (warned)")
    hsts_seconds: int = Field(default=31_536_000, ge=0, le=63_072_000,
                              description="Strict-Transport-Security max-age under TLS (0: not sent)")
    # Limits that hold under abuse.
    header_timeout: float = Field(default=10.0, gt=0.0, le=600.0, allow_inf_nan=False,
                                  description="seconds a connection may take to send a request's headers")
    max_connections: int = Field(default=1000, ge=1, le=100_000, description="open connections, all clients")
    max_connections_per_address: int = Field(default=100, ge=1, le=100_000,
                                             description="open connections from one client address")
    max_event_streams: int = Field(default=500, ge=1, le=100_000,
                                   description="open /api/v1/events streams, all clients")
    max_event_streams_per_address: int = Field(default=20, ge=1, le=100_000,
                                               description="open /api/v1/events streams from one client address")
    # Throttled guessing: failed authentications per client address.
    auth_failures: int = Field(default=5, ge=1, le=1_000_000,
                               description="failed authentications from one address within auth_window before 429")
    auth_window: float = Field(default=60.0, gt=0.0, le=86400.0, allow_inf_nan=False, description="seconds")
    auth_block_seconds: float = Field(default=30.0, gt=0.0, le=86400.0, allow_inf_nan=False,
                                      description="the first block; each further one doubles")
    auth_block_max_seconds: float = Field(default=3600.0, gt=0.0, le=86400.0, allow_inf_nan=False,
                                          description="the longest block")

    @field_validator("cors_origins", mode="before")
    @classmethod
    def _as_tuple(cls, value: object) -> object:
        return tuple(value) if isinstance(value, list) else value

    @field_validator("cors_origins")
    @classmethod
    def _origins(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        for origin in value:
            if origin == "*" or not origin.startswith(("http://", "https://")) or origin.rstrip("/") != origin:
                raise ValueError(f"each origin is scheme://host[:port] (no '*', no path), got {origin!r}")
        return value

    @model_validator(mode="after")
    def _pairs(self) -> HttpConfig:
        if bool(self.tls_cert_file) != bool(self.tls_key_file):
            raise ValueError("tls_cert_file and tls_key_file go together (both set: HTTPS; both empty: HTTP)")
        if self.tls_client_ca_file and not self.tls_cert_file:
            raise ValueError("tls_client_ca_file needs tls_cert_file and tls_key_file (client certificates are "
                             "checked during the TLS handshake)")
        if self.max_connections_per_address > self.max_connections:
            raise ValueError("max_connections_per_address must not exceed max_connections")
        if self.max_event_streams_per_address > self.max_event_streams:
            raise ValueError("max_event_streams_per_address must not exceed max_event_streams")
        if self.auth_block_max_seconds < self.auth_block_seconds:
            raise ValueError("auth_block_max_seconds must not be below auth_block_seconds")
        return self

    @property
    def tls(self) -> bool:
        """Served over HTTPS."""
        return bool(self.tls_cert_file)
