"""The namespace boundary of a policy's own PromQL (``spec.containers[].rateQuery``).

A SizingPolicy lives in one namespace, and whoever may write it there must not read
another namespace's series through it (its answer lands in the policy's status). So every
query the controller sends for a policy's ``rateQuery`` is parsed (``promql-parser``, a
PromQL parser from PyPI) and every vector selector in it — also those inside range
selectors, subqueries, function arguments and both sides of binary operators — must carry
the matcher ``namespace="<the policy's namespace>"`` (exact equality; ``=~`` is refused
because a regex can reach further than it looks). A selector written with the
``or``-separated matcher groups needs it in every group. The ``info()`` function is refused:
it reads ``target_info`` series that the query does not name.

Refuse, do not rewrite (the decision): a query missing the matcher is REFUSED with a
message naming the first offending selector, and the container is held with reason
``QueryRefused``. Rewriting (adding the matcher silently) would answer a different
question than the author asked — e.g. a ratio whose denominator came from another
namespace would silently become a ratio of something else — and an admin reading the
status could not tell. A refusal names what to add and is fixed in one edit.

What is checked is exactly what is sent: the guard runs on the FULL expression the
controller sends (the policy's query already wrapped in the controller's
``quantile_over_time(…[W:S])``), so text in ``rateQuery`` that would close the wrapper's
parenthesis early or comment it out cannot carry a selector past the check. The text sent
is the text checked (not the parser's re-rendering, which does not round-trip escapes).

The cluster admin can switch the check off with ``ratefit run --allow-raw-rate-queries``
(for clusters where every policy author may read every namespace's metrics anyway);
the series cap (:data:`DEFAULT_MAX_SERIES`, ``--max-rate-series``) holds either way.
"""

from __future__ import annotations

from dataclasses import dataclass

from ratefit.models.errors import InputError

__all__ = [
    "DEFAULT_MAX_SERIES",
    "QueryRefused",
    "QueryGuard",
    "check_namespace",
    "selectors",
]

#: at most this many series from one policy's query (ratefit run --max-rate-series)
DEFAULT_MAX_SERIES = 500
#: functions that read series the query does not name
REFUSED_FUNCTIONS = ("info",)


class QueryRefused(InputError):
    """A policy's PromQL that may not be sent: it cannot be parsed, or it reaches outside
    the policy's namespace. ``selector`` is the offending selector's text ('' when none)."""

    def __init__(self, message: str, *, selector: str = "") -> None:
        self.selector = selector
        super().__init__(message)


def _parse(query: str):  # -> promql_parser.Expr
    import promql_parser

    try:
        return promql_parser.parse(query)
    except ValueError as exc:
        raise QueryRefused(f"rateQuery is not valid PromQL: {exc}") from exc


def selectors(query: str) -> list[tuple[str, list[list[tuple[str, str, str]]]]]:
    """Every vector selector of ``query``: ``(text, groups)``, each group a list of
    ``(label, op, value)`` matchers that must all hold (``op`` one of ``=``, ``!=``,
    ``=~``, ``!~``). A plain selector has one group; ``{a="1" or b="2"}`` has two.
    Raises QueryRefused when the query does not parse."""
    import promql_parser as pp

    ops = ((pp.MatchOp.Equal, "="), (pp.MatchOp.NotEqual, "!="), (pp.MatchOp.Re, "=~"), (pp.MatchOp.NotRe, "!~"))

    def op_text(op) -> str:
        for known, text in ops:
            if op == known:
                return text
        return str(op)
    found: list[tuple[str, list[list[tuple[str, str, str]]]]] = []
    calls: list[str] = []

    def visit(node) -> None:
        if isinstance(node, pp.VectorSelector):
            def conv(ms) -> list[tuple[str, str, str]]:
                return [(m.name, op_text(m.op), m.value) for m in ms]
            base = conv(node.matchers.matchers)
            groups = [base + conv(g) for g in node.matchers.or_matchers] or [base]
            if node.name:
                groups = [[("__name__", "=", node.name)] + g for g in groups]
            found.append((str(node), groups))
        elif isinstance(node, pp.Call):
            calls.append(node.func.name)

    pp.walk(_parse(query), visit)
    for name in calls:
        if name in REFUSED_FUNCTIONS:
            raise QueryRefused(f"rateQuery calls {name}(), which reads series the query does not name; "
                               "select the series explicitly instead", selector=f"{name}(…)")
    return found


def check_namespace(query: str, namespace: str, *, label: str = "namespace") -> None:
    """Raise :class:`QueryRefused` unless every vector selector of ``query`` has the
    matcher ``label="namespace"`` (in every ``or`` group). The message names the first
    selector that does not, and the matcher to add."""
    sels = selectors(query)
    if not sels:
        raise QueryRefused("rateQuery selects no series; it must select the policy's own series, "
                           f'e.g. rate(http_requests_total{{{label}="{namespace}"}}[2m])')
    for text, groups in sels:
        for g in groups:
            if not any(n == label and op == "=" and v == namespace for n, op, v in g):
                other = [f'{n}{op}"{v}"' for n, op, v in g if n == label]
                why = (f"its {label} matcher {', '.join(other)} is not {label}=\"{namespace}\"" if other
                       else f"it has no {label} matcher")
                raise QueryRefused(
                    f"rateQuery selector {text} may read series outside namespace {namespace!r}: {why}; "
                    f'add {label}="{namespace}" to it (every selector of a policy\'s query needs it, '
                    "unless the controller runs with --allow-raw-rate-queries)",
                    selector=text,
                )


@dataclass(frozen=True, slots=True)
class QueryGuard:
    """The controller's rules for policies' own queries (passed to the rate source).

    ``enforce_namespace`` False: raw queries allowed (``--allow-raw-rate-queries``).
    ``max_series``: more series than this from one query → the container is held
    (TooManySeries); 0 switches the cap off.
    """

    enforce_namespace: bool = True
    max_series: int = DEFAULT_MAX_SERIES
    namespace_label: str = "namespace"

    def __post_init__(self) -> None:
        if self.max_series < 0:
            raise InputError(f"the series cap must be 0 (off) or positive, got {self.max_series}")

    def check(self, query: str, namespace: str) -> None:
        """Raise QueryRefused when ``query`` (the full text to be sent) may not be sent for
        a policy in ``namespace``. With raw queries allowed nothing is checked here
        (Prometheus judges the syntax; its refusal is reported as QueryFailed)."""
        if self.enforce_namespace:
            check_namespace(query, namespace, label=self.namespace_label)

    def too_many(self, count: int) -> bool:
        return self.max_series > 0 and count > self.max_series
