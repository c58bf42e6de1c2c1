"""Sample assembly by hand: the late-arrival rule, outputs that do not advance, history, limits, quality, state."""

from __future__ import annotations

import math

import numpy as np
import pytest

from service.config.tag_settings import ChannelTagsConfig
from service.tags.assembler import AssembledBatch, FormingRefusal, SampleAssembler

INF = math.inf


def _flow(history: int = 16, max_age: float = INF, **channel: object) -> SampleAssembler:
    """One channel: output FT, input u from SC."""
    config = ChannelTagsConfig.model_validate({"output": "FT", "inputs": {"u": "SC"}, **channel})
    return SampleAssembler({"flow": config}, {"FT": INF, "SC": max_age}, history=history)


def _rows(batch: AssembledBatch, channel: str = "flow") -> list[tuple[float, float, tuple[float, ...]]]:
    """(t, y, inputs) of each sample the batch formed for the channel."""
    samples = batch.samples.get(channel)
    if samples is None:
        return []
    return [(t, y, tuple(x)) for t, y, x in zip(samples.t.tolist(), samples.y.tolist(), samples.inputs.tolist(),
                                                strict=True)]


def _refusals(batch: AssembledBatch, channel: str = "flow") -> dict[str, int]:
    return {str(reason): n for reason, n in batch.refusals.get(channel, {}).items()}


def test_refusal_codes_are_stable() -> None:
    assert [str(r) for r in FormingRefusal] == ["output_bad_quality", "input_missing", "input_ahead", "input_stale",
                                               "input_unmatched", "input_bad_quality"]


# --- the late-arrival rule -------------------------------------------------------------------------------------


def test_a_late_input_never_revises_a_sample_and_counts_only_when_older() -> None:
    a = _flow()
    a.update("SC", 9.0, 1.0)
    assert _rows(a.update("FT", 10.0, 100.0)) == [(10.0, 100.0, (1.0,))]
    # SC stamped 9.5 arrives after the output at 10 it belonged to: the sample at 10 stays as formed ...
    late = a.update("SC", 9.5, 2.0)
    assert late.samples == {} and late.refusals == {} and late.not_newer == {}
    # ... and 9.5 is now SC's newest, used from the next output update on.
    assert _rows(a.update("FT", 11.0, 110.0)) == [(11.0, 110.0, (2.0,))]
    # Stamped before the newest kept one: not kept, counted.
    older = a.update("SC", 9.2, 3.0)
    assert older.not_newer == {"SC": 1}
    assert _rows(a.update("FT", 12.0, 120.0)) == [(12.0, 120.0, (2.0,))]
    # A repeat of the newest stamp (a correction, a redelivery) is not kept either: nothing is applied twice.
    assert a.update("SC", 9.5, 4.0).not_newer == {"SC": 1}
    assert _rows(a.update("FT", 13.0, 130.0)) == [(13.0, 130.0, (2.0,))]


def test_an_input_stamped_at_the_output_counts_only_if_it_arrives_first() -> None:
    before = _flow()
    before.update("SC", 9.0, 1.0)
    before.update("SC", 10.0, 2.0)
    assert _rows(before.update("FT", 10.0, 100.0)) == [(10.0, 100.0, (2.0,))]
    after = _flow()
    after.update("SC", 9.0, 1.0)
    assert _rows(after.update("FT", 10.0, 100.0)) == [(10.0, 100.0, (1.0,))]
    after.update("SC", 10.0, 2.0)
    assert _rows(after.update("FT", 11.0, 110.0)) == [(11.0, 110.0, (2.0,))]


def test_outputs_that_do_not_advance_are_passed_through() -> None:
    a = _flow()
    a.update("SC", 8.0, 1.0)
    a.update("SC", 9.5, 2.0)
    batch = a.assemble([0, 0, 0], [10.0, 10.0, 9.0], [100.0, 101.0, 90.0], np.array([True, True, True]))
    # Each forms its sample (the estimator refuses repeated and backward times by its own rule) ...
    assert _rows(batch) == [(10.0, 100.0, (2.0,)), (10.0, 101.0, (2.0,)), (9.0, 90.0, (1.0,))]
    # ... and, not being newer, none of the last two is kept as FT's value.
    assert batch.not_newer == {"FT": 2}
    assert batch.samples["flow"].position.tolist() == [0, 1, 2]


# --- history: outputs that lag their inputs --------------------------------------------------------------------


def test_an_output_finds_the_input_of_its_own_moment() -> None:
    a = _flow(history=4)
    for second in range(1, 6):
        a.update("SC", float(second), 10.0 * second)
    assert _rows(a.update("FT", 2.5, 1.0)) == [(2.5, 1.0, (20.0,))]


def test_an_output_older_than_the_history_is_input_ahead() -> None:
    a = _flow(history=2)
    for second in range(1, 6):
        a.update("SC", float(second), 10.0 * second)
    assert _refusals(a.update("FT", 2.5, 1.0)) == {"input_ahead": 1}
    assert _rows(a.update("FT", 4.0, 1.0)) == [(4.0, 1.0, (40.0,))]


def test_an_input_first_seen_after_the_output_is_missing() -> None:
    a = _flow(history=2)
    assert _refusals(a.update("FT", 1.0, 1.0)) == {"input_missing": 1}
    a.update("SC", 3.0, 30.0)
    assert _refusals(a.update("FT", 2.0, 1.0)) == {"input_missing": 1}


# --- limits and quality ----------------------------------------------------------------------------------------


def test_max_age_bounds_the_input_inclusively() -> None:
    a = _flow(max_age=2.0)
    a.update("SC", 8.0, 1.0)
    assert _rows(a.update("FT", 10.0, 100.0)) == [(10.0, 100.0, (1.0,))]     # 2 s old: still valid
    assert _refusals(a.update("FT", 10.5, 100.0)) == {"input_stale": 1}


def test_matched_mode_takes_only_inputs_within_tolerance_before_the_output() -> None:
    a = _flow(mode="matched", tolerance=0.5)
    a.update("SC", 9.5, 1.0)
    assert _rows(a.update("FT", 10.0, 100.0)) == [(10.0, 100.0, (1.0,))]
    assert _refusals(a.update("FT", 10.25, 100.0)) == {"input_unmatched": 1}
    a.update("SC", 10.5, 2.0)                                                 # after the output: not its match
    assert _refusals(a.update("FT", 10.4, 100.0)) == {"input_unmatched": 1}


def test_matched_mode_reports_stale_when_max_age_is_stricter() -> None:
    a = _flow(max_age=1.0, mode="matched", tolerance=3.0)
    a.update("SC", 8.0, 1.0)
    assert _refusals(a.update("FT", 10.0, 100.0)) == {"input_stale": 1}
    equal = _flow(max_age=1.0, mode="matched", tolerance=1.0)
    equal.update("SC", 8.0, 1.0)
    assert _refusals(equal.update("FT", 10.0, 100.0)) == {"input_unmatched": 1}


def test_bad_quality_of_output_or_of_the_input_value_used() -> None:
    a = _flow()
    a.update("SC", 8.0, 1.0)
    assert _refusals(a.update("FT", 9.0, math.nan, good=False)) == {"output_bad_quality": 1}
    a.update("SC", 9.5, math.nan, good=False)
    # The newest SC at or before 10 is bad; the older good value is not used instead.
    assert _refusals(a.update("FT", 10.0, 100.0)) == {"input_bad_quality": 1}
    a.update("SC", 10.5, 3.0)
    assert _rows(a.update("FT", 11.0, 110.0)) == [(11.0, 110.0, (3.0,))]


def test_the_first_failed_check_gives_the_reason() -> None:
    config = ChannelTagsConfig(output="FT", inputs={"u": "A", "v": "B"})
    a = SampleAssembler({"c": config}, {"FT": INF, "A": INF, "B": INF})
    a.update("B", 1.0, math.nan, good=False)
    assert _refusals(a.update("FT", 2.0, 1.0), "c") == {"input_missing": 1}          # u before v
    assert _refusals(a.update("FT", 3.0, 1.0, good=False), "c") == {"output_bad_quality": 1}
    a.update("A", 3.5, 1.0)
    assert _refusals(a.update("FT", 4.0, 1.0), "c") == {"input_bad_quality": 1}


# --- shapes of plants ------------------------------------------------------------------------------------------


def test_one_input_feeds_many_channels_and_twins_feed_each_other() -> None:
    channels = {"flow": ChannelTagsConfig(output="FT1", inputs={"speed": "SC", "twin": "FT2"}),
                "pressure": ChannelTagsConfig(output="PT", inputs={"speed": "SC"}),
                "twin": ChannelTagsConfig(output="FT2", inputs={"twin": "FT1"})}
    a = SampleAssembler(channels, {"FT1": INF, "FT2": INF, "SC": INF, "PT": INF})
    ix = {tag: k for k, tag in enumerate(a.tag_ids)}
    batch = a.assemble(*SampleAssembler.columns_of([
        (ix["SC"], 1.0, 50.0, True),
        (ix["FT2"], 1.0, 7.0, True),     # twin: FT1 not seen yet
        (ix["FT1"], 1.0, 7.5, True),     # flow: SC and FT2 of this moment
        (ix["PT"], 1.0, 3.0, True),
        (ix["FT2"], 2.0, 7.1, True),     # twin: FT1 at 1
    ]))
    assert _rows(batch, "flow") == [(1.0, 7.5, (50.0, 7.0))]
    assert _rows(batch, "pressure") == [(1.0, 3.0, (50.0,))]
    assert _rows(batch, "twin") == [(2.0, 7.1, (7.5,))]
    assert _refusals(batch, "twin") == {"input_missing": 1}
    assert batch.samples["twin"].position.tolist() == [4]
    assert batch.samples["flow"].input_names == ("speed", "twin")


def test_a_channel_without_inputs_samples_every_output_update() -> None:
    a = SampleAssembler({"level": ChannelTagsConfig(output="LT")}, {"LT": INF})
    batch = a.assemble([0, 0], [1.0, 2.0], [0.5, 0.6], np.array([True, True]))
    assert batch.samples["level"].inputs.shape == (2, 0)
    assert batch.samples["level"].y.tolist() == [0.5, 0.6]


def test_tags_no_channel_names_have_no_index() -> None:
    a = _flow()
    assert a.tag_ids == ("FT", "SC")
    assert a.index_of("FT") == 0 and a.index_of("other") is None
    with pytest.raises(ValueError, match="no channel names tag 'other'"):
        a.update("other", 1.0, 1.0)


# --- bad calls -------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("columns", "match"), [
    (([0, 1], [1.0], [1.0], [True]), "1-D of one length"),
    (([[0]], [[1.0]], [[1.0]], [[True]]), "1-D of one length"),
    (([0.0], [1.0], [1.0], [True]), "integer indexes"),
    (([2], [1.0], [1.0], [True]), r"in \[0, 2\)"),
    (([-1], [1.0], [1.0], [True]), r"in \[0, 2\)"),
    (([0], [math.nan], [1.0], [True]), "t must be finite"),
    (([0], [math.inf], [1.0], [True]), "t must be finite"),
    (([0], [1.0], [math.nan], [True]), "good quality must be finite"),
    (([0], [1.0], [1.0], [1]), "good must be booleans"),
])
def test_bad_batches_are_refused_and_change_nothing(columns: tuple[object, ...], match: str) -> None:
    a = _flow()
    a.update("SC", 1.0, 1.0)
    before = a.export_state()
    with pytest.raises(ValueError, match=match):
        a.assemble(*(np.asarray(c) for c in columns))
    after = a.export_state()
    assert before[1] == after[1]
    for name in before[0]:
        np.testing.assert_array_equal(before[0][name], after[0][name])


def test_empty_batch_gives_nothing() -> None:
    assert _flow().assemble([], [], [], []) == AssembledBatch({}, {}, {})


def test_construction_checks() -> None:
    config = {"flow": ChannelTagsConfig(output="FT", inputs={"u": "SC"})}
    with pytest.raises(ValueError, match="max_age lacks tag"):
        SampleAssembler(config, {"FT": INF})
    with pytest.raises(ValueError, match="max_age must be > 0"):
        SampleAssembler(config, {"FT": INF, "SC": 0.0})
    with pytest.raises(ValueError, match="history must be >= 1"):
        SampleAssembler(config, {"FT": INF, "SC": INF}, history=0)


# --- state -----------------------------------------------------------------------------------------------------


def test_state_lists_each_tags_kept_updates_oldest_first() -> None:
    a = _flow(history=3)
    for second in range(1, 5):
        a.update("SC", float(second), 10.0 * second, good=second != 3)
    arrays, meta = a.export_state()
    assert meta == {"tag_ids": ["FT", "SC"], "history": 3}
    assert arrays["t"][1].tolist() == [2.0, 3.0, 4.0]
    assert arrays["value"][1].tolist() == [20.0, 30.0, 40.0]
    assert arrays["good"][1].tolist() == [True, False, True]
    assert arrays["held"].tolist() == [0, 3] and arrays["dropped"].tolist() == [False, True]
    assert np.isnan(arrays["t"][0]).all()


def test_state_matches_tags_by_id_across_a_changed_configuration() -> None:
    old = _flow(history=4)
    for second in range(1, 4):
        old.update("SC", float(second), 10.0 * second)
    arrays, meta = old.export_state()
    channels = {"speed": ChannelTagsConfig(output="PT", inputs={"u": "SC"})}
    new = SampleAssembler(channels, {"PT": INF, "SC": INF}, history=2)
    assert new.import_state(arrays, meta) == ["FT"]
    # The smaller history keeps the newest two (2 s and 3 s); older ones count as dropped.
    assert _rows(new.update("PT", 2.5, 1.0), "speed") == [(2.5, 1.0, (20.0,))]
    assert _refusals(new.update("PT", 1.5, 1.0), "speed") == {"input_ahead": 1}
    assert new.update("SC", 3.0, 99.0).not_newer == {"SC": 1}       # the newest stamp came back with the state


def test_state_with_wrong_shapes_is_refused_and_changes_nothing() -> None:
    a = _flow()
    a.update("SC", 1.0, 1.0)
    arrays, meta = a.export_state()
    bad = dict(arrays, t=arrays["t"][:, :3])
    with pytest.raises(ValueError, match="state array 't' has shape"):
        a.import_state(bad, meta)
    with pytest.raises(ValueError, match="'held' must be in"):
        a.import_state(dict(arrays, held=np.array([0, 99])), meta)
    assert _rows(a.update("FT", 2.0, 5.0)) == [(2.0, 5.0, (1.0,))]


@pytest.mark.parametrize(("tag", "t", "value", "good", "match"), [
    (2, 1.0, 1.0, True, r"in \[0, 2\)"),
    (-1, 1.0, 1.0, True, r"in \[0, 2\)"),
    ("FT", math.inf, 1.0, True, "t must be finite"),
    ("FT", 1.0, math.inf, True, "good quality must be finite"),
])
def test_bad_single_updates_are_refused_and_change_nothing(tag: int | str, t: float, value: float, good: bool,
                                                          match: str) -> None:
    a = _flow()
    a.update("SC", 1.0, 1.0)
    with pytest.raises(ValueError, match=match):
        a.update(tag, t, value, good)
    assert a.update("SC", 1.5, 2.0).not_newer == {}
    assert a.update("FT", 1.0, math.nan, good=False).refusals == {"flow": {FormingRefusal.OUTPUT_BAD_QUALITY: 1}}
