"""Every subcommand's --help: plain text (no reStructuredText backticks — what a terminal
shows is read as is; RULES "--help that explains (plain text)"), the time words of the
CLI (one word per idea), and the exit codes of plan and run --once documented."""

from __future__ import annotations

import argparse
from collections.abc import Iterator

from ratefit.controller.cli import build_parser


def _walk(p: argparse.ArgumentParser, path: tuple[str, ...]) -> Iterator[tuple[tuple[str, ...], str]]:
    yield path, p.format_help()
    for a in p._actions:
        if isinstance(a, argparse._SubParsersAction):
            for name, sp in a.choices.items():
                yield from _walk(sp, (*path, name))


def _helps() -> dict[str, str]:
    return {" ".join(path): text for path, text in _walk(build_parser(), ("ratefit",))}


def test_every_help_is_plain_text_without_backticks() -> None:
    helps = _helps()
    assert len(helps) >= 14  # ratefit, its subcommands, models list/show
    bad = {name: [ln.strip() for ln in text.splitlines() if "`" in ln] for name, text in helps.items()}
    assert {k: v for k, v in bad.items() if v} == {}


def test_time_words_and_model_names_are_the_same_everywhere() -> None:
    helps = _helps()
    assert "--interval" in helps["ratefit run"] and "--rate-range" in helps["ratefit run"]
    assert "--rate-range" in helps["ratefit plan"] and "--rate-interval" not in helps["ratefit plan"]
    assert "--lookback" in helps["ratefit train"] and "--window" not in helps["ratefit train"]
    assert "--reload-interval" in helps["ratefit serve"]
    for cmd in ("train", "predict", "report", "models show"):
        assert "NAMESPACE/WORKLOAD/CONTAINER" in helps[f"ratefit {cmd}"].split("\n\n")[0], cmd  # positional
    assert "KIND/NAME" in helps["ratefit revert"] and "-n NAMESPACE" in helps["ratefit revert"]
    for cmd in ("plan", "predict", "models list", "models show", "revert", "demo"):
        assert "{table,json,markdown}" in helps[f"ratefit {cmd}"], cmd


def test_plan_and_run_document_their_exit_codes() -> None:
    helps = _helps()
    for cmd in ("ratefit plan", "ratefit run"):
        text = helps[cmd]
        assert "Exit status" in text
        for code in ("3  the Kubernetes API server", "4  Prometheus", "5  the sizing API", "6  every container",
                     "7  (run --once) the leader Lease"):
            assert code in text, (cmd, code)


def test_old_spellings_still_parse_as_hidden_aliases() -> None:
    p = build_parser()
    a = p.parse_args(["train", "--key", "a/b/c", "--window", "2h", "--samples", "x.csv", "--store", "s"])
    assert (a.key_option, a.window) == ("a/b/c", "2h")
    a = p.parse_args(["plan", "--sizing-api", "http://127.0.0.1:1", "--rate-interval", "5m"])
    assert a.rate_range == "5m"
    a = p.parse_args(["plan", "--sizing-api", "http://127.0.0.1:1"])
    assert a.rate_range == "2m"
