"""What a tag update costs: sample assembly for 1,000 channels of one input each, and the message front end.

The plant: 1,000 channels, each an output tag and an input tag of its own (2,000 tags). Every scan
(1 s of plant time) each tag reports once, in a random arrival order, so about half of the outputs
find their input of the same scan and the others the one before; every output update forms a
sample. Time advances from call to call (an offset added per call, outside the assembler), so
every update is newer than the one its tag holds, as in a live plant.

Assembly, microseconds per tag update:

* ``assemble``, a scan (2,000 updates) per call: the batch entry point, columns in and out;
* ``assemble``, 100 updates per call: small micro-batches (per-batch overhead spread thinner);
* ``update``, one update per call: the one-at-a-time path (the same loop, scalar checks).

Front end, microseconds per message: :meth:`TagRegistry.resolve` and the decoder, for a bare number
on an exact topic, the same on a topic a pattern named (remembered after its first message), and a
JSON message with time stamp and quality pointers. Timings are printed, never asserted.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from service.config.tag_settings import ChannelTagsConfig, TagConfig, TagFormatConfig
from service.tags.assembler import SampleAssembler
from service.tags.registry import ListedTag, TagMatch, TagRegistry
from service.tags.tag_payload import TagReading
from tests.benchmarks._common import Budget, best_times, print_header, print_table

pytestmark = pytest.mark.benchmark

CHANNELS = 1_000
SCANS = 8                     # distinct scans cycled through (time shifted on each pass)
EPOCH = 1767225600.0          # 2026-01-01T00:00:00Z
BUDGET = Budget(min_time=0.4, max_calls=200_000, rounds=3)
MESSAGES = 2_000


def _plant() -> tuple[SampleAssembler, dict[str, ChannelTagsConfig]]:
    channels = {f"ch{i:04d}": ChannelTagsConfig(output=f"FT{i:04d}", inputs={"u": f"SC{i:04d}"})
                for i in range(CHANNELS)}
    max_age = {tag: 5.0 for config in channels.values() for tag in (config.output, *config.inputs.values())}
    return SampleAssembler(channels, max_age), channels


def _scans(assembler: SampleAssembler, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SCANS scans of every tag once, random order per scan: tag index, stamp (s), value; one row per update."""
    n_tags = len(assembler.tag_ids)
    tags = np.concatenate([rng.permutation(n_tags) for _ in range(SCANS)]).astype(np.int64)
    stamps = EPOCH + np.repeat(np.arange(SCANS, dtype=np.float64), n_tags) \
        + np.tile(np.linspace(0.0, 0.9, n_tags), SCANS)                     # within a scan, in arrival order
    return tags, stamps, rng.normal(size=tags.shape[0])


def _batched(assembler: SampleAssembler, tags: np.ndarray, stamps: np.ndarray, values: np.ndarray,
             size: int) -> tuple[Callable[[], None], list[int]]:
    """A call that feeds the next ``size`` updates; the stamps shift by SCANS s on each pass over the scans."""
    good = np.ones(size, dtype=bool)
    state = {"start": 0, "offset": 0.0}
    formed = [0]

    def run() -> None:
        start = state["start"]
        stop = int(start) + size
        batch = assembler.assemble(tags[int(start):stop], stamps[int(start):stop] + state["offset"],
                                   values[int(start):stop], good)
        formed[0] += sum(len(s) for s in batch.samples.values())
        if stop >= tags.shape[0]:
            state["start"], state["offset"] = 0, state["offset"] + SCANS
        else:
            state["start"] = stop

    return run, formed


def _singles(assembler: SampleAssembler, tags: np.ndarray, stamps: np.ndarray, values: np.ndarray,
             block: int) -> Callable[[], None]:
    """A call that feeds the next ``block`` updates one ``update`` at a time."""
    tag_list, value_list = tags.tolist(), values.tolist()
    state = {"start": 0, "offset": 0.0}

    def run() -> None:
        start, offset = int(state["start"]), state["offset"]
        update = assembler.update
        for i in range(start, start + block):
            update(tag_list[i], float(stamps[i]) + offset, value_list[i])
        if start + block >= len(tag_list):
            state["start"], state["offset"] = 0, offset + SCANS
        else:
            state["start"] = start + block

    return run


def test_assembly_cost_per_tag_update(make_rng: Callable[[int], np.random.Generator]) -> None:
    rng = make_rng(11)
    rows = []
    per_update: dict[str, float] = {}
    for label, size in (("assemble, 2000 per call", 2 * CHANNELS), ("assemble, 100 per call", 100)):
        assembler, _ = _plant()
        tags, stamps, values = _scans(assembler, rng)
        run, formed = _batched(assembler, tags, stamps, values, size)
        seconds = best_times({label: run}, BUDGET)[label]
        per_update[label] = seconds / size
        assert formed[0] > 0                          # the stream does form samples (not a timing)
    assembler, _ = _plant()
    tags, stamps, values = _scans(assembler, rng)
    block = 200
    seconds = best_times({"update": _singles(assembler, tags, stamps, values, block)}, BUDGET)["update"]
    per_update["update, 1 per call"] = seconds / block
    for label, seconds_each in per_update.items():
        rows.append((label, f"{seconds_each * 1e6:.2f}", f"{1.0 / seconds_each:,.0f}"))
    print_header(f"sample assembly: {CHANNELS} channels x 1 input, {2 * CHANNELS} tags, each output forms a sample")
    print_table(("path", "us per tag update", "updates per s"), rows)


def _front_end() -> tuple[TagRegistry, dict[str, list[tuple[str, bytes]]]]:
    gateway = TagFormatConfig(kind="json", value="/v", time="/ts", time_unit="ms", quality="/q", good=["good"])
    tags = [ListedTag(TagConfig(id=f"FT{i:04d}", topic=f"plant/FT{i:04d}"), "bench") for i in range(MESSAGES)]
    tags += [ListedTag(TagConfig(id=f"PT{i:04d}", topic=f"json/PT{i:04d}", format="gateway"), "bench")
             for i in range(MESSAGES)]
    tags.append(ListedTag(TagConfig(id="{1}.{2}", topic="gw/+/+/value"), "bench"))
    registry = TagRegistry(tags, {"gateway": gateway})
    messages = {
        "number, exact topic": [(f"plant/FT{i:04d}", f"{i * 0.37:.3f}".encode()) for i in range(MESSAGES)],
        "number, pattern topic": [(f"gw/area{i % 7}/FT{i:04d}/value", f"{i * 0.37:.3f}".encode())
                                  for i in range(MESSAGES)],
        "json with time and quality": [(f"json/PT{i:04d}",
                                        b'{"v": %.3f, "ts": %d, "q": "good"}' % (i * 0.37, 1767225600000 + i))
                                       for i in range(MESSAGES)],
    }
    return registry, messages


def test_front_end_cost_per_message() -> None:
    registry, messages = _front_end()
    arrival = EPOCH
    for batch in messages.values():             # every message reads (and the pattern topics are named once)
        for topic, payload in batch:
            match = registry.resolve(topic)
            assert isinstance(match, TagMatch)
            assert isinstance(match.decoder.decode(payload, arrival), TagReading)

    def runner(batch: list[tuple[str, bytes]]) -> Callable[[], None]:
        resolve = registry.resolve

        def run() -> None:
            for topic, payload in batch:
                resolve(topic).decoder.decode(payload, arrival)   # every topic resolves (checked above)

        return run

    times = best_times({label: runner(batch) for label, batch in messages.items()}, BUDGET)
    rows = [(label, f"{seconds / MESSAGES * 1e6:.2f}", f"{MESSAGES / seconds:,.0f}")
            for label, seconds in times.items()]
    print_header("tag messages: registry look-up + payload decoding")
    print_table(("message", "us per message", "messages per s"), rows)
