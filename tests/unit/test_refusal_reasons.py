"""Every refusal reason is a member of one of four StrEnums, and the README names each one a user can meet."""

from __future__ import annotations

import re
from pathlib import Path
from typing import get_args

from estimator import SampleRefusal
from service.broker_link.messages import EngineRefusal, RefusalReason
from service.broker_link.payload import REASONS, PayloadRefusal
from service.broker_link.tag_refusal import REGISTRY_REASONS, TAG_PAYLOAD_REASONS, TagRefusal
from service.tags.assembler import FormingRefusal

README = Path(__file__).resolve().parents[2] / "README.md"


def test_the_reasons_are_the_payloads_the_tags_the_estimators_and_the_engines() -> None:
    assert get_args(RefusalReason) == (PayloadRefusal, TagRefusal, SampleRefusal, EngineRefusal)
    assert frozenset(PayloadRefusal) == REASONS
    assert frozenset(TagRefusal) == TAG_PAYLOAD_REASONS | REGISTRY_REASONS
    assert not TAG_PAYLOAD_REASONS & REGISTRY_REASONS


def test_a_reason_a_tag_message_shares_with_a_sample_payload_means_the_same() -> None:
    shared = {r.value for r in TagRefusal} & {r.value for r in PayloadRefusal}
    assert shared == {"too_large", "non_finite", "bad_time"}


def test_a_reason_the_payload_shares_with_the_estimator_is_the_estimators_code() -> None:
    shared = {r.value for r in PayloadRefusal} & {r.value for r in SampleRefusal}
    assert shared == {"non_finite", "bad_time", "bad_sigma", "bad_weight", "missing_input"}
    assert not {r.value for r in EngineRefusal} & ({r.value for r in PayloadRefusal} | {r.value for r in SampleRefusal})


def test_the_readme_names_every_reason() -> None:
    named = set(re.findall(r"`([a-z_]+)`", README.read_text(encoding="utf-8")))
    every = {r.value for enum in (PayloadRefusal, TagRefusal, SampleRefusal, EngineRefusal, FormingRefusal)
             for r in enum}
    assert every - named == set()
