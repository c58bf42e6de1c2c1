"""A fleet of replicas sharing the channels: this replica's share, and reads of the others' channels.

Each replica runs the whole service for the channels it owns (:mod:`service.fleet.sharding`): it subscribes
to their topics only, keeps their state in its own store (its own schema of a shared PostgreSQL), and
answers for them. A read of a channel another replica owns is fetched from that replica for the caller
(``fleet.reads = "proxy"``, the token passed on) or answered with a 307 to it (``"redirect"``). The fleet
snapshot gathers every replica's own snapshot; the channels of a replica that does not answer are
listed Bad, with the reason ``replica_unreachable``, so a SCADA poll never silently loses them.
"""

from __future__ import annotations

import json
import socket
import ssl
import urllib.error
import urllib.request
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

from service.config.settings import ConfigError, RwlsConfig
from service.engine.quality import Quality, QualityReason
from service.fleet.sharding import Shard, owner, parse_shard

__all__ = ["Fleet", "PeerAnswer", "own_share"]

UNREACHABLE = QualityReason.REPLICA_UNREACHABLE


def own_share(config: RwlsConfig, hostname: str | None = None) -> tuple[RwlsConfig, Shard | None]:
    """The configuration of this replica's channels only (unchanged when not sharded), and its shard.

    Raises
    ------
    ConfigError
        ``fleet.shard`` cannot be read, the replica list does not match the count, or this replica
        would own no channel.
    """
    fleet = config.fleet
    if not fleet.shard:
        return config, None
    try:
        shard = parse_shard(fleet.shard, socket.gethostname() if hostname is None else hostname)
    except ValueError as exc:
        raise ConfigError([f"fleet.shard: {exc}"]) from None
    if fleet.replicas and len(fleet.replicas) != shard.count:
        raise ConfigError([f"fleet.replicas: {len(fleet.replicas)} URLs for {shard.count} replicas"])
    mine = shard.owned(config.channels)
    if not mine:
        raise ConfigError([f"fleet.shard: replica {shard} owns none of the {len(config.channels)} channels; "
                           "run fewer replicas"])
    store = config.store
    if store.url.startswith("postgresql") and not store.schema_name:
        store = store.model_copy(update={"schema_name": f"rwls_shard_{shard.index}_of_{shard.count}"})
    share = config.model_copy(update={"channels": {c: config.channels[c] for c in mine}, "store": store})
    return share, shard


@dataclass(frozen=True)
class PeerAnswer:
    status: int
    body: bytes
    content_type: str


class Fleet:
    """The other replicas, as seen from this one."""

    def __init__(self, shard: Shard, replicas: tuple[str, ...], channels: list[str], *, reads: str,
                 timeout: float, ca_file: str = "", cert_file: str = "", key_file: str = "") -> None:
        self.shard = shard
        # Replicas served over HTTPS: verified against ca_file (else the system's CAs), and a client
        # certificate of our own when they require one (http.tls_client_ca_file).
        self._tls = ssl.create_default_context(cafile=ca_file or None)
        if cert_file:
            self._tls.load_cert_chain(cert_file, key_file or None)
        self.replicas = replicas
        self.channels = list(channels)                # every channel of the fleet, in configuration order
        self.reads = reads
        self.timeout = timeout
        self._pool = ThreadPoolExecutor(max_workers=max(1, shard.count - 1), thread_name_prefix="rwls-fleet")

    def owner(self, channel: str) -> int:
        return owner(channel, self.shard.count)

    def is_remote(self, channel: str) -> bool:
        """A channel of the fleet that another replica owns."""
        return channel in self.channels and not self.shard.owns(channel)

    def url(self, index: int, path_and_query: str) -> str:
        return self.replicas[index] + path_and_query

    def fetch(self, index: int, path_and_query: str, headers: Mapping[str, str]) -> PeerAnswer | None:
        """GET from replica ``index``; None when it does not answer (refused, timed out, not HTTP)."""
        request = urllib.request.Request(self.url(index, path_and_query), headers=dict(headers))
        try:
            with urllib.request.urlopen(request, timeout=self.timeout,  # our own replicas
                                        context=self._tls) as response:
                return PeerAnswer(response.status, response.read(), response.headers.get("content-type", ""))
        except urllib.error.HTTPError as exc:        # it answered: its refusal is the answer
            return PeerAnswer(exc.code, exc.read(), exc.headers.get("content-type", ""))
        except (OSError, ValueError):
            return None

    def gather(self, path_and_query: str, headers: Mapping[str, str]) -> dict[int, Any]:
        """The JSON answer of every other replica (None for one that did not answer with 200), in parallel."""
        others = [k for k in range(self.shard.count) if k != self.shard.index]
        answers = list(self._pool.map(lambda k: self.fetch(k, path_and_query, headers), others))
        out: dict[int, Any] = {}
        for k, answer in zip(others, answers, strict=True):
            try:
                out[k] = json.loads(answer.body) if answer is not None and answer.status == 200 else None
            except ValueError:
                out[k] = None
        return out

    def unreachable_entry(self, channel: str) -> dict[str, object]:
        return {"quality": Quality.BAD, "quality_reason": UNREACHABLE, "replica": self.owner(channel)}

    def snapshot(self, local: dict[str, Any], headers: Mapping[str, str]) -> dict[str, Any]:
        """The fleet snapshot: this replica's channels, every other replica's, Bad for the silent ones."""
        channels: dict[str, Any] = dict(local["channels"])
        replicas = [{"index": self.shard.index, "reachable": True, "version": local.get("version")}]
        for k, doc in self.gather("/api/v1/snapshot?scope=local", headers).items():
            replicas.append({"index": k, "reachable": doc is not None,
                             "version": None if doc is None else doc.get("version")})
            if doc is not None:
                channels.update(doc.get("channels", {}))
        for channel in self.channels:
            if channel not in channels:
                channels[channel] = self.unreachable_entry(channel)
        ordered = {c: channels[c] for c in self.channels if c in channels}
        return {"created_at": local.get("created_at"), "replicas": sorted(replicas, key=lambda r: r["index"]),
                "channels": ordered}

    def channel_list(self, local: list[dict[str, Any]], headers: Mapping[str, str]) -> list[dict[str, Any]]:
        """``GET /api/v1/channels`` over the fleet, in configuration order."""
        by_id = {c["id"]: c for c in local}
        for doc in self.gather("/api/v1/channels?scope=local", headers).values():
            for c in doc or []:
                by_id[c["id"]] = c
        return [by_id.get(c, {"id": c, **self.unreachable_entry(c)}) for c in self.channels]

    def close(self) -> None:
        self._pool.shutdown(wait=False, cancel_futures=True)
