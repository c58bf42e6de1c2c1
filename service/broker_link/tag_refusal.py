"""Why a tag message is refused (dead-lettered with this reason): its payload, or the tag its topic names.

The payload reasons are the tag decoders' (:mod:`service.tags.tag_payload`), the others the tag
registry's (:mod:`service.tags.registry`); each module's docstring says when each one applies. A
sample that a channel could not form from good tag messages is no refusal of a message: see
:class:`service.tags.assembler.FormingRefusal`.
"""

from __future__ import annotations

from enum import StrEnum

__all__ = ["REGISTRY_REASONS", "TAG_PAYLOAD_REASONS", "TagRefusal"]


class TagRefusal(StrEnum):
    """Stable codes, shared with the sample payload's where the meaning is the same (``too_large``...)."""

    # The payload (checked in this order)
    TOO_LARGE = "too_large"
    BAD_JSON = "bad_json"
    NON_FINITE = "non_finite"
    MISSING_VALUE = "missing_value"
    NOT_A_NUMBER = "not_a_number"
    MISSING_TIME = "missing_time"
    BAD_TIME = "bad_time"
    MISSING_QUALITY = "missing_quality"
    BAD_QUALITY = "bad_quality"
    # The tag the topic names
    BAD_TAG_ID = "bad_tag_id"
    TAG_ID_TAKEN = "tag_id_taken"
    TOO_MANY_TAGS = "too_many_tags"


REGISTRY_REASONS = frozenset({TagRefusal.BAD_TAG_ID, TagRefusal.TAG_ID_TAKEN, TagRefusal.TOO_MANY_TAGS})
TAG_PAYLOAD_REASONS = frozenset(TagRefusal) - REGISTRY_REASONS
