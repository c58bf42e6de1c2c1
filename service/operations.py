"""The engine's operations: everything an operator or engineer changes, as named data.

An operation is a name and JSON-able arguments (who, when, what). The engine
writes it to the input log in order with the samples before it runs it, so
recovery replays it exactly: the same transition, with the same user,
comment and time, lands in the journal once. Each function runs on the engine
thread and returns a JSON-able result.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from estimator.baseline import Baseline

if TYPE_CHECKING:
    from service.engine import Engine

__all__ = ["OPERATIONS", "baseline_dict"]


def baseline_dict(baseline: Baseline | None) -> dict[str, Any] | None:
    if baseline is None:
        return None
    return {"version": baseline.version, "source": baseline.source}


def _book(engine: Engine) -> Any:
    if engine.alarms is None:
        raise RuntimeError("this engine keeps no alarms")
    return engine.alarms


def _acknowledge(engine: Engine, a: dict[str, Any]) -> Any:
    return _book(engine).acknowledge(a["alarm"], a["user"], a["time"], a.get("comment", "")).to_dict()


def _shelve(engine: Engine, a: dict[str, Any]) -> Any:
    return _book(engine).shelve(a["alarm"], a["user"], a["time"], a["until"], a.get("comment", "")).to_dict()


def _unshelve(engine: Engine, a: dict[str, Any]) -> Any:
    return _book(engine).unshelve(a["alarm"], a["user"], a["time"], a.get("comment", "")).to_dict()


def _remove(engine: Engine, a: dict[str, Any]) -> Any:
    return _book(engine).remove(a["alarm"], a["user"], a["time"], a.get("comment", "")).to_dict()


def _restore(engine: Engine, a: dict[str, Any]) -> Any:
    return _book(engine).restore(a["alarm"], a["user"], a["time"], a.get("comment", "")).to_dict()


def _last_t(engine: Engine, channel: str) -> float | None:
    return engine.bank.view([channel])[channel].last_t


def _learn_baseline(engine: Engine, a: dict[str, Any]) -> Any:
    channel = a["channel"]
    made = engine.bank.learn_baseline(channel, _last_t(engine, channel), note=a.get("note", ""))
    engine.touch(channel)
    return None if made is None else made.version


def _set_baseline(engine: Engine, a: dict[str, Any]) -> Any:
    channel = a["channel"]
    made = engine.bank.set_baseline(channel, a["parameters"], noise_sigma=a["noise_sigma"],
                                    t=_last_t(engine, channel), note=a.get("note", ""))
    engine.touch(channel)
    return made.version


def _reset(engine: Engine, a: dict[str, Any]) -> Any:
    channel = a["channel"]
    engine.bank.reset(channel, _last_t(engine, channel))
    engine.touch(channel)
    return channel


OPERATIONS: dict[str, Callable[[Engine, dict[str, Any]], Any]] = {
    "acknowledge": _acknowledge, "shelve": _shelve, "unshelve": _unshelve, "remove": _remove,
    "restore": _restore, "learn_baseline": _learn_baseline, "set_baseline": _set_baseline, "reset": _reset,
}
