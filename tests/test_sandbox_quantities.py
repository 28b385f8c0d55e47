"""Server-side quantity handling of the sandbox (what the API server stores), checked
against the official client's `kubernetes.utils.parse_quantity` (a reference library)
and the canonical forms of apimachinery `resource.Quantity.String()` (examples from the
Kubernetes docs "Resource Management for Pods and Containers" — "0.1" is "100m" — and,
from memory, apimachinery's quantity tests)."""

from __future__ import annotations

from decimal import ROUND_CEILING, Decimal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from kubernetes.utils import parse_quantity

from ratefit.controller.sandbox.quantities import QuantityError, canonicalize, parse_value


@pytest.mark.parametrize(("given_", "canonical"), [
    ("0.1", "100m"), ("0.5", "500m"), ("1.5", "1500m"), ("1000m", "1"), ("100m", "100m"),
    ("2000", "2k"), ("1", "1"), ("0", "0"), ("1024Mi", "1Gi"), ("0.5Gi", "512Mi"),
    ("1.5Gi", "1536Mi"), ("1000Ki", "1000Ki"), ("1e3", "1e3"), ("12e6", "12e6"),
    ("0.0001", "100u"), ("128974848", "128974848"), ("129M", "129M"), ("123Mi", "123Mi"),
])
def test_canonical_forms(given_: str, canonical: str) -> None:
    assert canonicalize(given_) == canonical
    assert parse_quantity(canonical) == parse_quantity(given_)


@pytest.mark.parametrize("bad", ["", "half", "1.2.3", "1 m", "m", "1KB", "--1", "1Ki5", "0x10"])
def test_malformed(bad: str) -> None:
    with pytest.raises(QuantityError):
        canonicalize(bad)


_digits = st.text(alphabet="0123456789", min_size=1, max_size=5)
_number = st.one_of(_digits, st.builds(lambda a, b: f"{a}.{b}", _digits, _digits))
_suffix = st.sampled_from(["", "m", "u", "n", "k", "M", "G", "Ki", "Mi", "Gi", "e3", "e-2"])


@settings(max_examples=300, deadline=None)
@given(_number, _suffix)
def test_value_matches_the_reference_library(number: str, suffix: str) -> None:
    text = number + suffix
    ref = parse_quantity(text)
    # apimachinery keeps nano precision and rounds up; parse_quantity keeps all digits
    ref_nano = ref.quantize(Decimal("1e-9"), rounding=ROUND_CEILING)
    assert parse_value(text) == ref_nano
    canon = canonicalize(text)
    assert parse_quantity(canon) == ref_nano   # the canonical form means the same amount
    assert canonicalize(canon) == canon        # and is a fixed point
