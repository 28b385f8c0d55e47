"""CPU quantity parsing and formatting, checked against the official Kubernetes client's
``kubernetes.utils.parse_quantity`` (a reference library) and the Kubernetes docs."""

from __future__ import annotations

import math
from decimal import Decimal

import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from kubernetes.utils import parse_quantity

from ratefit.controller.quantity import MAX_MILLICORES, format_cpu, parse_cpu
from ratefit.models.errors import InputError

# Quantity grammar from the Kubernetes API reference ("Quantity"):
#   <quantity> ::= <signedNumber><suffix>; suffix = binarySI | decimalSI | e<signedNumber>
_digits = st.text(alphabet="0123456789", min_size=1, max_size=6)
_number = st.one_of(
    _digits,
    st.builds(lambda a, b: f"{a}.{b}", _digits, _digits),
    st.builds(lambda b: f".{b}", _digits),
    st.builds(lambda a: f"{a}.", _digits),
)
_suffix = st.one_of(
    st.sampled_from(["", "n", "u", "m", "k", "M", "G", "Ki", "Mi"]),
    st.builds(lambda sign, e: f"e{sign}{e}", st.sampled_from(["", "+", "-"]), st.integers(0, 12)),
    st.builds(lambda e: f"E{e}", st.integers(0, 9)),
)
quantities = st.builds(lambda sign, n, s: f"{sign}{n}{s}", st.sampled_from(["", "+"]), _number, _suffix)


def reference_millicores(text: str) -> int:
    """Millicores by the reference parser, rounded up to 1m (Kubernetes docs: CPU precision
    is 1m; finer values round up)."""
    return math.ceil(parse_quantity(text) * 1000)


@settings(max_examples=400, deadline=None)
@given(quantities)
def test_parse_agrees_with_reference_parser(text: str) -> None:
    ref = reference_millicores(text)
    assume(ref <= MAX_MILLICORES)
    assert parse_cpu(text) == ref


@settings(max_examples=400, deadline=None)
@given(st.integers(min_value=0, max_value=10**15))
def test_format_round_trips_through_reference_parser(milli: int) -> None:
    text = format_cpu(milli)
    # the reference parser reads back exactly the millicores we wrote
    assert parse_quantity(text) * 1000 == Decimal(milli)
    assert parse_cpu(text) == milli


@settings(max_examples=300, deadline=None)
@given(st.integers(min_value=0, max_value=10**15))
def test_format_is_canonical(milli: int) -> None:
    # Canonical form (apimachinery Quantity.String(), from memory): an integer mantissa with
    # the largest power-of-1000 suffix that keeps it an integer; milli only when needed.
    text = format_cpu(milli)
    body = text.rstrip("mkMGTPE")
    assert body.isdigit() and (body == "0" or not body.startswith("0"))
    if text.endswith("m"):
        assert milli % 1000 != 0
    elif milli:
        assert int(body) % 1000 != 0


@settings(max_examples=500, deadline=None)
@given(st.text(alphabet="0123456789.+-eEmkMGTPEnuKi _xN", max_size=8))
def test_whatever_we_accept_the_reference_accepts_identically(text: str) -> None:
    try:
        ours = parse_cpu(text)
    except InputError:
        return  # we may be stricter than the reference (e.g. '1e3m', ' 1', '1_0')
    assert ours == reference_millicores(text)


@pytest.mark.parametrize(
    ("text", "milli"),
    [
        # Kubernetes docs, "Resource units in Kubernetes": 0.1 == 100m; 0.5 CPU == 500m.
        ("0.1", 100),
        ("100m", 100),
        ("0.5", 500),
        ("250m", 250),
        ("2", 2000),
        ("1500m", 1500),
        ("1e3", 1_000_000),
        ("1k", 1_000_000),
        # finer than 1m rounds up (DESIGN.md, Kubernetes facts: "CPU precision is 1m")
        ("100u", 1),
        ("1n", 1),
        ("1001u", 2),
        ("0.0005", 1),
        ("0", 0),
    ],
)
def test_documented_examples(text: str, milli: int) -> None:
    assert parse_cpu(text) == milli
    assert reference_millicores(text) == milli


@pytest.mark.parametrize(
    ("milli", "text"),
    # The API server re-emits canonically: "0.5" comes back as "500m" (DESIGN.md,
    # Kubernetes facts), 2000m as "2", 1000 cores as "1k" (apimachinery, from memory).
    [(500, "500m"), (2000, "2"), (1500, "1500m"), (1, "1m"), (0, "0"), (1_000_000, "1k"), (2_500_000, "2500")],
)
def test_canonical_examples(milli: int, text: str) -> None:
    assert format_cpu(milli) == text


@pytest.mark.parametrize("bad", ["", "m", "abc", "1.5.5", "1e3m", " 1", "1 ", "1_000", "NaN", "inf", "1mi", "1ki", "0x10", "--1"])
def test_malformed_is_input_error_naming_field(bad: str) -> None:
    with pytest.raises(InputError, match="containers\\[web\\]"):
        parse_cpu(bad, field="containers[web]")


def test_negative_and_too_large_refused() -> None:
    with pytest.raises(InputError, match="negative"):
        parse_cpu("-250m")
    with pytest.raises(InputError, match="too large"):
        parse_cpu("1e30")
    with pytest.raises(InputError):
        format_cpu(-1)


def test_numbers_from_yaml() -> None:
    # YAML `cpu: 2` / `cpu: 0.25` arrive as numbers
    assert parse_cpu(2) == 2000
    assert parse_cpu(0.25) == 250
    with pytest.raises(InputError):
        parse_cpu(True)
    with pytest.raises(InputError):
        parse_cpu(float("nan"))
