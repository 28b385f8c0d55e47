"""Resource quantities as the API server reads and re-emits them.

Follows apimachinery `resource.Quantity`: the grammar

    <quantity> ::= <signedNumber><suffix>
    <suffix>   ::= Ki|Mi|Gi|Ti|Pi|Ei | n|u|m|""|k|M|G|T|P|E | e<signedNumber>|E<signedNumber>

values are rounded up to nano precision, and `String()` emits the canonical form in
the format of the suffix the value came with (binary, decimal SI or exponent):
"0.5" → "500m", "1000m" → "1", "1536Mi" stays, "0.5Gi" → "512Mi", a binary value
below 1024 or with a fraction falls back to decimal SI. The server uses this to
canonicalise what it stores; `kubernetes.utils.parse_quantity` is the reference
the tests compare the numeric value with.
"""

from __future__ import annotations

import re
from decimal import ROUND_CEILING, Decimal, localcontext

#: the message apimachinery's ParseQuantity gives for malformed input
QUANTITY_ERROR = ("quantities must match the regular expression "
                  "'^([+-]?[0-9.]+)([eEinumkKMGTP]*[-+]?[0-9]*)$'")

_NUM = r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)"
_RE = re.compile(rf"^({_NUM})((?:[KMGTPE]i)|[numkMGTPE]?|[eE][+-]?[0-9]+)$")

_BINARY = {"Ki": 1, "Mi": 2, "Gi": 3, "Ti": 4, "Pi": 5, "Ei": 6}
_DECIMAL = {"n": -9, "u": -6, "m": -3, "": 0, "k": 3, "M": 6, "G": 9, "T": 12, "P": 15, "E": 18}
_DEC_SUFFIX = {v: k for k, v in _DECIMAL.items()}
_BIN_SUFFIX = {v: k for k, v in _BINARY.items()}


__all__ = ["Decimal", "QuantityError", "canonical", "canonicalize", "parse", "parse_value"]


class QuantityError(ValueError):
    """A string that is not a Kubernetes quantity."""


def parse(text: str) -> tuple[Decimal, str]:
    """Return (value, format) with format one of "BinarySI", "DecimalSI", "DecimalExponent"."""
    if not isinstance(text, str):
        if isinstance(text, bool):
            raise QuantityError(QUANTITY_ERROR)
        if isinstance(text, (int, float)):
            text = repr(text) if isinstance(text, float) else str(text)
        else:
            raise QuantityError(QUANTITY_ERROR)
    m = _RE.match(text.strip() if text != text.strip() else text)
    if not m or text != text.strip():
        raise QuantityError(QUANTITY_ERROR)
    number, suffix = m.group(1), m.group(2)
    with localcontext() as ctx:
        ctx.prec = 80
        value = Decimal(number)
        if suffix in _BINARY:
            value *= Decimal(1024) ** _BINARY[suffix]
            fmt = "BinarySI"
        elif suffix[:1] in ("e", "E"):
            value = value.scaleb(int(suffix[1:]))
            fmt = "DecimalExponent"
        else:
            value = value.scaleb(_DECIMAL[suffix])
            fmt = "DecimalSI"
        # apimachinery keeps at most nano precision and rounds up (away from -inf)
        value = value.quantize(Decimal("1e-9"), rounding=ROUND_CEILING)
    return value, fmt


def parse_value(text: str) -> Decimal:
    return parse(text)[0]


def _canonical_decimal(value: Decimal) -> tuple[str, int]:
    """Digits and a power-of-ten exponent (multiple of 3) with an integer mantissa."""
    if value == 0:
        return "0", 0
    with localcontext() as ctx:
        ctx.prec = 80
        exp = -9
        mantissa = value.scaleb(9)
        while exp < 18:
            nxt = mantissa.scaleb(-3)
            if nxt != nxt.to_integral_value():
                break
            mantissa = nxt
            exp += 3
        return str(int(mantissa)), exp


def canonical(value: Decimal, fmt: str) -> str:
    """`Quantity.String()` for a parsed value in its format."""
    if fmt == "BinarySI":
        if -1024 < value < 1024 or value != value.to_integral_value():
            fmt = "DecimalSI"
    if fmt == "BinarySI":
        n = int(value)
        exp = 0
        while n != 0 and n % 1024 == 0 and exp < 6:
            n //= 1024
            exp += 1
        return f"{n}{_BIN_SUFFIX.get(exp, '') if exp else ''}"
    digits, exp = _canonical_decimal(value)
    if fmt == "DecimalExponent":
        return digits if exp == 0 else f"{digits}e{exp}"
    return f"{digits}{_DEC_SUFFIX[exp]}"


def canonicalize(text: str) -> str:
    value, fmt = parse(text)
    return canonical(value, fmt)
