"""Polls ``GET /api/v1/snapshot`` from a separate process and times each sample's arrival (127.0.0.1 only).

A sample is measured when a poll shows a channel's ``t`` different from the
previous poll: its latency is the wall-clock time the response arrived minus
``t``, which the publisher set to its ``time.time()`` just before publishing
(same machine, same clock). ``updated_at - t`` is the part up to the hand-over
from paho's ``on_message`` to the engine queue. A channel updated twice
between two polls shows only its later sample, so the count measured is
printed. Polls use ``If-None-Match``: an unchanged snapshot costs a 304.

Prints ``ready`` after its first full snapshot (the publisher starts then).
Stops after ``--max-seconds``, or once updates began and none came for
``--quiet`` seconds. Prints one JSON object on stdout, last.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from urllib.parse import urlsplit

import httpx


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--url", required=True)
    parser.add_argument("--max-seconds", type=float, required=True)
    parser.add_argument("--quiet", type=float, default=2.0)
    parser.add_argument("--interval", type=float, default=0.01, help="pause between polls, seconds")
    args = parser.parse_args(argv)
    if urlsplit(args.url).hostname != "127.0.0.1":
        parser.error("--url must point at 127.0.0.1")
    last_t: dict[str, float] = {}
    latency: list[float] = []
    handover: list[float] = []
    poll_seconds: list[float] = []
    polls = not_modified = errors = 0
    etag = None
    started = time.monotonic()
    changed_at: float | None = None
    with httpx.Client(timeout=5.0) as client:
        while time.monotonic() - started < args.max_seconds:
            if changed_at is not None and time.monotonic() - changed_at > args.quiet:
                break
            asked = time.perf_counter()
            try:
                response = client.get(args.url, headers={"If-None-Match": etag} if etag else None)
            except httpx.HTTPError:
                errors += 1
                time.sleep(args.interval)
                continue
            observed = time.time()
            poll_seconds.append(time.perf_counter() - asked)
            polls += 1
            if response.status_code == 304:
                not_modified += 1
            elif response.status_code != 200:
                errors += 1
            else:
                if etag is None:
                    print("ready", flush=True)       # the benchmark starts publishing after this line
                etag = response.headers.get("etag")
                for cid, record in response.json()["channels"].items():
                    t = record["t"]
                    if t is None or last_t.get(cid) == t:
                        continue
                    last_t[cid] = t
                    latency.append(observed - t)
                    if record["updated_at"] is not None:
                        handover.append(record["updated_at"] - t)
                    changed_at = time.monotonic()
            time.sleep(args.interval)
    print(json.dumps({"polls": polls, "not_modified": not_modified, "errors": errors, "latency": latency,
                      "handover": handover, "poll_seconds": poll_seconds,
                      "cpu_seconds": time.process_time()}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
