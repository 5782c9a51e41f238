"""Marshmallow schemas for query parameters and headers.

The model document itself is validated by service.document, which is shared
by POST, PATCH and MPS input and reports JSON pointers into the body.
"""

from __future__ import annotations

import re

from marshmallow import RAISE, Schema, ValidationError, fields, post_load, validate

from service.serialize import SECTIONS, SOLUTION_VIEWS

IDEMPOTENCY_KEY_RE = re.compile(r"^[\x21-\x7e]{1,255}$")


class CommaList(fields.String):
    """A comma-separated list of names from a fixed set."""

    def __init__(self, choices: tuple[str, ...], **kwargs) -> None:
        super().__init__(**kwargs)
        self.choices = choices

    def _deserialize(self, value, attr, data, **kwargs):
        text = super()._deserialize(value, attr, data, **kwargs)
        items = [p.strip() for p in text.split(",") if p.strip()]
        bad = [p for p in items if p not in self.choices]
        if bad:
            raise ValidationError(
                f"unknown section(s) {', '.join(bad)}; choose from {', '.join(self.choices)}"
            )
        return tuple(items)


class ResultQuery(Schema):
    """How much of a result to return: sections, the solution view, the change report length."""

    class Meta:
        unknown = RAISE

    sections = CommaList(SECTIONS, data_key="fields", load_default=SECTIONS)
    solution = fields.String(validate=validate.OneOf(SOLUTION_VIEWS), load_default="full")
    changes_limit = fields.Integer(validate=validate.Range(min=0, max=100_000), load_default=100)


class CreateQuery(ResultQuery):
    """POST of a model also names the engine of its cold solves."""

    cold_engine = fields.String(validate=validate.OneOf(("highs", "builtin")), load_default=None)


class ModelQuery(ResultQuery):
    """GET of a model also names whether the document comes along."""

    include_model = fields.Boolean(data_key="model", load_default=True)


class ListQuery(Schema):
    class Meta:
        unknown = RAISE

    limit = fields.Integer(validate=validate.Range(min=1, max=200), load_default=50)
    offset = fields.Integer(validate=validate.Range(min=0, max=10_000_000), load_default=0)


class EmptyQuery(Schema):
    class Meta:
        unknown = RAISE


class IdempotencyKey(Schema):
    key = fields.String(
        validate=validate.Regexp(IDEMPOTENCY_KEY_RE, error="1 to 255 visible ASCII characters")
    )

    @post_load
    def unwrap(self, data, **kwargs):
        return data["key"]
