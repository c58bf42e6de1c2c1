"""Channel ownership across replicas: stable in every process, every channel owned exactly once."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from service.config.settings import ConfigError, parse_config
from service.fleet.peers import Fleet, own_share
from service.fleet.sharding import Shard, owner, parse_shard
from tests.support.addresses import free_port

CHANNELS = [f"plant{p}.line{k}.sensor" for p in range(3) for k in range(20)]


def test_every_channel_has_exactly_one_owner_and_the_split_is_even_enough() -> None:
    for count in (1, 2, 3, 5):
        shards = [Shard(k, count) for k in range(count)]
        owned = [set(s.owned(CHANNELS)) for s in shards]
        assert set().union(*owned) == set(CHANNELS)
        assert sum(len(o) for o in owned) == len(CHANNELS)                  # disjoint
        assert min(len(o) for o in owned) >= len(CHANNELS) / count / 3        # no replica starved


def test_ownership_does_not_depend_on_the_process_or_its_hash_seed() -> None:
    code = ("import json, sys; from service.fleet.sharding import owner; "
            "print(json.dumps([owner(c, 3) for c in json.loads(sys.argv[1])]))")
    runs = []
    for seed in ("0", "1", "12345"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        out = subprocess.run([sys.executable, "-c", code, json.dumps(CHANNELS)], env=env, check=True,
                             capture_output=True, text=True, timeout=60)
        runs.append(json.loads(out.stdout))
    assert runs[0] == runs[1] == runs[2] == [owner(c, 3) for c in CHANNELS]


@pytest.mark.parametrize(("spec", "host", "want"), [("1/3", "", Shard(1, 3)), ("auto/3", "rwls-2", Shard(2, 3)),
                                                     ("auto/4", "rwls-0", Shard(0, 4)), (" 0/1 ", "", Shard(0, 1))])
def test_shard_specs(spec: str, host: str, want: Shard) -> None:
    assert parse_shard(spec, host) == want


@pytest.mark.parametrize(("spec", "host"), [("3/3", ""), ("a/3", ""), ("1/0", ""), ("auto/3", "rwls"),
                                            ("auto/3", "rwls-7"), ("1-3", "")])
def test_bad_shard_specs_are_refused(spec: str, host: str) -> None:
    with pytest.raises(ValueError):
        parse_shard(spec, host)


def _config(shard: str, replicas: list[str] | None = None, **store: object) -> object:
    return parse_config({"channels": {c: {"terms": ["1", "u"], "topic": f"t/{c}"} for c in CHANNELS},
                         "fleet": {"shard": shard, "replicas": replicas or []}, "store": store})


def test_a_replica_runs_only_its_share_in_a_schema_of_its_own() -> None:
    config = _config("1/3", url="postgresql://rwls@db:5432/rwls")
    share, shard = own_share(config, hostname="x")            # type: ignore[arg-type]
    assert shard == Shard(1, 3)
    assert list(share.channels) == [c for c in CHANNELS if owner(c, 3) == 1]
    assert share.store.schema_name == "rwls_shard_1_of_3"
    whole, none = own_share(_config(""), hostname="x")        # type: ignore[arg-type]
    assert none is None and list(whole.channels) == CHANNELS


def test_a_replica_list_of_the_wrong_length_is_a_configuration_error() -> None:
    with pytest.raises(ConfigError, match=r"fleet\.replicas"):
        own_share(_config("0/3", ["http://a:1", "http://b:1"]), hostname="x")   # type: ignore[arg-type]


def test_the_fleet_snapshot_marks_the_channels_of_a_silent_replica_bad() -> None:
    dead = [f"http://127.0.0.1:{free_port()}" for _ in range(3)]         # nothing listens there
    fleet = Fleet(Shard(0, 3), tuple(dead), CHANNELS, reads="proxy", timeout=0.5)
    try:
        mine = {c: {"quality": "Good"} for c in CHANNELS if owner(c, 3) == 0}
        doc = fleet.snapshot({"version": 7, "created_at": 1.0, "channels": mine}, {})
    finally:
        fleet.close()
    assert list(doc["channels"]) == CHANNELS                                # every channel, in order
    for c, entry in doc["channels"].items():
        if owner(c, 3) == 0:
            assert entry == {"quality": "Good"}
        else:
            assert entry == {"quality": "Bad", "quality_reason": "replica_unreachable", "replica": owner(c, 3)}
    assert [r["reachable"] for r in doc["replicas"]] == [True, False, False]


def test_a_replica_in_redirect_mode_sends_reads_of_other_channels_to_their_owner(tmp_path: object) -> None:
    from service.api.app import create_app
    from service.runtime import Runtime
    from tests.support.auth_tokens import auth_section
    from tests.support.clients import api_client

    urls = ["http://rwls-0.peers:8080", "http://rwls-1.peers:8080", "http://rwls-2.peers:8080"]
    config = parse_config({"channels": {c: {"terms": ["1", "u"]} for c in CHANNELS},
                           "fleet": {"shard": "0/3", "replicas": urls, "reads": "redirect"},
                           "store": {"path": str(tmp_path)}, "auth": auth_section()})
    runtime = Runtime(config, mqtt=False)
    assert set(runtime.config.channels) == {c for c in CHANNELS if owner(c, 3) == 0}
    with api_client(create_app(runtime), "source", follow_redirects=False) as client:
        theirs = next(c for c in CHANNELS if owner(c, 3) == 2)
        answer = client.get(f"/api/v1/channels/{theirs}/history?limit=5")
        assert answer.status_code == 307
        assert answer.headers["location"] == f"{urls[2]}/api/v1/channels/{theirs}/history?limit=5"
        mine = next(c for c in CHANNELS if owner(c, 3) == 0)
        assert client.get(f"/api/v1/channels/{mine}").json()["id"] == mine
        assert client.get("/api/v1/channels/no.such.channel").status_code == 404
