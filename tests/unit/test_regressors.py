"""Term parsing, the batch regressor block and the streaming builder (estimator/channels/regressors.py)."""

from __future__ import annotations

import numpy as np
import pytest

from estimator import BuilderState, Factor, NotUsable, RegressorBuilder, RegressorSpec, parse_term


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("1", ()),
        ("u", (Factor("u", 0, 1),)),
        ("u^3", (Factor("u", 0, 3),)),
        ("a*b", (Factor("a", 0, 1), Factor("b", 0, 1))),
        ("u[-2]", (Factor("u", 2, 1),)),
        ("y[-1]", (Factor("y", 1, 1),)),
        ("a[-1]*b^2", (Factor("a", 1, 1), Factor("b", 0, 2))),
        ("u[-3]^2", (Factor("u", 3, 2),)),
        ("ref_temp.pv*speed", (Factor("ref_temp.pv", 0, 1), Factor("speed", 0, 1))),
    ],
)
def test_parse_term_reads_every_term_form(text: str, expected: tuple[Factor, ...]) -> None:
    term = parse_term(text)
    assert term.factors == expected
    assert term.text == text


def test_parse_term_ignores_whitespace_and_canonicalises_the_text() -> None:
    term = parse_term(" a [-1] * b ^ 2 ")
    assert term.text == "a[-1]*b^2"
    assert term.factors == (Factor("a", 1, 1), Factor("b", 0, 2))


def test_factor_is_output_only_for_y() -> None:
    assert parse_term("y[-2]").factors[0].is_output
    assert not parse_term("yaw").factors[0].is_output


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", "term is empty"),
        ("   ", "term is empty"),
        ("y", r"the output y can only appear lagged, as y\[-k\]"),
        ("u*y^2", r"the output y can only appear lagged"),
        ("u[-0]", "lag must be >= 1, got 0"),
        ("u^0", "power must be >= 1, got 0"),
        ("2u", r"cannot read factor '2u'"),
        ("u[-x]", r"cannot read factor 'u\[-x\]'"),
        ("u[2]", r"cannot read factor 'u\[2\]'"),
        ("u^-1", r"cannot read factor 'u\^-1'"),
        ("u**2", r"cannot read factor ''"),
        ("1*u", r"cannot read factor '1'"),
    ],
)
def test_parse_term_rejects_malformed_terms_with_a_message(text: str, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        parse_term(text)


@pytest.mark.parametrize("value", [3, None, b"u", ["u"]])
def test_parse_term_rejects_non_strings(value: object) -> None:
    with pytest.raises(ValueError, match="term must be a string"):
        parse_term(value)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("terms", "match"),
    [
        (["u", "v", "u"], "'u' is the same regressor as 'u'"),
        (["a*b", "a * b"], r"'a\*b' is the same regressor as 'a\*b'"),
        (["a*b", "b*a"], r"'b\*a' is the same regressor as 'a\*b'"),
        (["u^2", "u*u"], r"'u\*u' is the same regressor as 'u\^2'"),
        (["y[-1]*u", "u*y[-1]"], r"'u\*y\[-1\]' is the same regressor as 'y\[-1\]\*u'"),
        ([], "terms must be a non-empty list of strings"),
        ("u", "terms must be a non-empty list of strings"),
        (["u", 2], "term must be a string, got 2"),
    ],
)
def test_spec_rejects_bad_term_lists(terms: object, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        RegressorSpec(terms)  # type: ignore[arg-type]


def test_spec_reports_names_inputs_lags_and_warmup() -> None:
    spec = RegressorSpec(["1", "u", "u[-2]", "y[-3]", "a[-1]*b^2"])
    assert spec.names == ["1", "u", "u[-2]", "y[-3]", "a[-1]*b^2"]
    assert spec.n_params == 5
    assert spec.input_names == ("a", "b", "u")
    assert spec.input_lags == {"u": 2, "a": 1, "b": 0}
    assert spec.output_lag == 3
    assert spec.warmup == 3


def test_spec_without_lags_needs_no_warmup() -> None:
    spec = RegressorSpec(["1", "u^2"])
    assert spec.warmup == 0
    assert spec.output_lag == 0


SPEC_TERMS = ["1", "u", "u^3", "a*b", "u[-2]", "y[-1]", "a[-1]*b^2", "y[-3]^2"]


def _history(seed: int, count: int) -> tuple[dict[str, np.ndarray], np.ndarray]:
    rng = np.random.default_rng(seed)
    inputs = {name: rng.normal(size=count) for name in ("u", "a", "b")}
    inputs["unused"] = rng.normal(size=count)   # extra inputs are ignored
    return inputs, rng.normal(size=count)


def test_block_rows_equal_streaming_rows_bit_for_bit() -> None:
    spec = RegressorSpec(SPEC_TERMS)
    inputs, y = _history(seed=5, count=60)
    Z, usable = spec.block(inputs, y)
    builder = RegressorBuilder(spec)
    rows = []
    for k in range(y.shape[0]):
        sample = {name: float(values[k]) for name, values in inputs.items()}
        if k < spec.warmup:
            with pytest.raises(NotUsable, match="samples needed for lags") as info:
                builder.row(sample)
            assert info.value.reason == "lags_not_filled"
        else:
            rows.append(builder.row(sample))
        builder.push(sample, float(y[k]))
    np.testing.assert_array_equal(usable, np.arange(60) >= spec.warmup)
    # Exact: both evaluators multiply in the same order (module docstring).
    assert np.array_equal(np.array(rows), Z[usable])


def test_block_computes_hand_worked_values() -> None:
    spec = RegressorSpec(["1", "u", "u^3", "a*b", "u[-2]", "y[-1]", "a[-1]*b^2"])
    inputs = {"u": np.array([2.0, 3.0, 5.0]), "a": np.array([1.0, -2.0, 4.0]), "b": np.array([0.5, 3.0, -1.0])}
    y = np.array([10.0, 20.0, 30.0])
    Z, usable = spec.block(inputs, y)
    # Row 2: u=5, u^3=125, a*b=-4, u[-2]=2, y[-1]=20, a[-1]*b^2=-2*1=-2 (exact in binary).
    np.testing.assert_array_equal(Z[2], [1.0, 5.0, 125.0, -4.0, 2.0, 20.0, -2.0])
    np.testing.assert_array_equal(usable, [False, False, True])
    # Lagged factors read zero before the warmup, as documented.
    np.testing.assert_array_equal(Z[0], [1.0, 2.0, 8.0, 0.5, 0.0, 0.0, 0.0])


def test_block_names_missing_inputs() -> None:
    spec = RegressorSpec(["a", "b*c"])
    with pytest.raises(ValueError, match="inputs missing: b, c"):
        spec.block({"a": np.zeros(3)}, np.zeros(3))


def test_row_reports_missing_input_and_keeps_state() -> None:
    spec = RegressorSpec(["1", "u", "v[-1]"])
    builder = RegressorBuilder(spec)
    builder.push({"u": 1.0, "v": 2.0}, 3.0)
    before = builder.state()
    with pytest.raises(NotUsable, match="input 'v' missing") as info:
        builder.row({"u": 1.0})
    assert info.value.reason == "missing_input"
    assert builder.state() == before


def test_row_needs_an_input_that_is_only_used_lagged() -> None:
    # The current value is needed to fill the lag buffer when the sample is pushed.
    builder = RegressorBuilder(RegressorSpec(["u[-1]"]))
    with pytest.raises(NotUsable, match="input 'u' missing") as info:
        builder.row({})
    assert info.value.reason == "missing_input"


def test_missing_input_takes_precedence_over_unfilled_lags() -> None:
    builder = RegressorBuilder(RegressorSpec(["u[-2]"]))
    with pytest.raises(NotUsable) as info:
        builder.row({})
    assert info.value.reason == "missing_input"


def test_row_reports_lags_not_filled_until_warmup_samples_were_pushed() -> None:
    builder = RegressorBuilder(RegressorSpec(["u[-2]", "y[-1]"]))
    for accepted in range(2):
        with pytest.raises(NotUsable, match=f"{accepted} of 2 samples needed for lags") as info:
            builder.row({"u": 1.0})
        assert info.value.reason == "lags_not_filled"
        builder.push({"u": float(accepted + 10)}, float(accepted + 20))
    assert builder.row({"u": 99.0}) == [10.0, 21.0]


def test_state_restore_round_trip_continues_identically() -> None:
    spec = RegressorSpec(SPEC_TERMS)
    inputs, y = _history(seed=9, count=40)
    samples = [{name: float(values[k]) for name, values in inputs.items()} for k in range(40)]
    original = RegressorBuilder(spec)
    for k in range(20):
        original.push(samples[k], float(y[k]))
    restored = RegressorBuilder(spec)
    restored.restore(original.state())
    assert restored.state() == original.state()
    for k in range(20, 40):
        assert restored.row(samples[k]) == original.row(samples[k])
        original.push(samples[k], float(y[k]))
        restored.push(samples[k], float(y[k]))
    assert restored.state() == original.state()


def test_state_is_a_copy_of_the_buffers() -> None:
    builder = RegressorBuilder(RegressorSpec(["u[-1]", "y[-1]"]))
    builder.push({"u": 1.0}, 2.0)
    snapshot = builder.state()
    builder.push({"u": 3.0}, 4.0)
    assert snapshot == BuilderState(accepted=1, outputs=(2.0,), inputs={"u": (1.0,)}, keeps_history=True)


def test_lag_buffers_keep_only_what_the_terms_need() -> None:
    builder = RegressorBuilder(RegressorSpec(["u[-2]", "y[-1]", "v"]))
    for k in range(5):
        builder.push({"u": float(k), "v": -1.0}, float(10 + k))
    assert builder.state() == BuilderState(accepted=5, outputs=(14.0,), inputs={"u": (3.0, 4.0)}, keeps_history=True)
