"""One vocabulary across the subcommands (README "The subcommands"): the same concept has the
same flag and the same metavar everywhere, and every option says what it does. The rules are
Limner's own (common practice for command-line tools, no source)."""
from __future__ import annotations

import argparse

import pytest

from limner.runtime.cli import build_parser


def _subcommands() -> dict[str, argparse.ArgumentParser]:
    p = build_parser()
    sub = next(a for a in p._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


SUBS = _subcommands()


def _options(sp: argparse.ArgumentParser):
    return [a for a in sp._actions if not isinstance(a, argparse._HelpAction)]


@pytest.mark.parametrize("name", sorted(SUBS))
def test_every_option_has_help(name):
    missing = [a.dest for a in _options(SUBS[name]) if not (a.help or "").strip()]
    assert not missing, f"limner {name}: no help for {missing}"


@pytest.mark.parametrize("name", sorted(SUBS))
def test_same_concept_same_flag_and_metavar(name):
    for a in _options(SUBS[name]):
        flags = set(a.option_strings)
        if "--out" in flags:
            assert a.metavar == "OUT" and "-o" in flags, (name, a.metavar)
        if "--content" in flags or "--calibration" in flags or "--preview" in flags:
            assert a.metavar == "PATH", (name, a.dest, a.metavar)
        if flags & {"--frames", "--threads", "--workers"}:
            assert a.metavar == "N", (name, a.dest, a.metavar)
        if a.metavar == "WxH":
            # a frame or activation size is always --resolution (one) or --resolutions (a list)
            assert flags & {"--resolution", "--resolutions"}, (name, flags)
        if "--teacher" in flags or a.dest == "teacher":
            assert a.metavar == "TEACHER", (name, a.metavar)


def test_resolution_flags_take_wxh_everywhere():
    seen = {(n, a.option_strings[0]) for n, sp in SUBS.items() for a in _options(sp)
            if set(a.option_strings) & {"--resolution", "--resolutions"}}
    assert {n for n, _ in seen} >= {"live", "bench", "pick", "int8-probe"}
    for n, flag in seen:
        a = next(x for x in _options(SUBS[n]) if flag in x.option_strings)
        assert a.metavar == "WxH", (n, flag, a.metavar)
