"""Cluster profile models: byte strings as Dask reads them, and validation
messages that name the key."""

from __future__ import annotations

import pytest
from dask.utils import parse_bytes  # reference: Dask's own reader of these strings
from pydantic import BaseModel, ConfigDict, ValidationError, field_validator

from descatter.tasks.cluster_profile import LocalProfile, byte_count, explain_validation_error


@pytest.mark.parametrize("text", ["4000000000", "0", "12.5"])
def test_bare_byte_counts_only_where_allowed(text):
    assert byte_count(text, bare=True) == parse_bytes(text)
    with pytest.raises(ValueError, match="expected a size with a unit"):
        byte_count(text)


@pytest.mark.parametrize("text", ["1e3GB", "4 G B", ".5GB", "", "4XB"])
def test_forms_dask_would_read_differently_or_not_at_all_are_refused(text):
    with pytest.raises(ValueError, match=f"got {text!r}"):
        byte_count(text, bare=True)


class _Inner(BaseModel):
    model_config = ConfigDict(extra="forbid")
    size: int

    @field_validator("size")
    @classmethod
    def _even(cls, v: int) -> int:
        if v % 2:
            raise ValueError(f"expected an even size, got {v!r}")
        return v


class _Outer(BaseModel):
    model_config = ConfigDict(extra="forbid")
    inner: _Inner


def _error(model, doc) -> ValidationError:
    with pytest.raises(ValidationError) as info:
        model.model_validate(doc)
    return info.value


def test_explanation_names_the_source_and_each_dotted_key():
    exc = _error(_Outer, {"inner": {"size": 3, "sise": 4}})
    text = explain_validation_error(exc, _Outer, source="x.toml", what="thing")
    lines = text.splitlines()
    assert lines[0] == "x.toml: invalid thing"
    # pydantic's "Value error, " prefix is dropped, and the value is not repeated
    assert "  - inner.size: expected an even size, got 3" in lines
    assert "  - inner.sise: unknown key (expected one of: size)" in lines
    hinted = explain_validation_error(exc, _Outer, source="x.toml", what="thing", unknown_key_hint="see the docs")
    assert "  - inner.sise: unknown key (see the docs)" in hinted.splitlines()


def test_explanation_adds_the_value_got_when_the_message_lacks_it():
    exc = _error(LocalProfile, {"workers": 0})
    text = explain_validation_error(exc, LocalProfile, source="p.toml", what="cluster profile")
    assert "  - workers: Input should be greater than or equal to 1 (got 0)" in text.splitlines()
