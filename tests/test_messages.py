"""Message rendering: escaping tables, human numbers, the incident message and demo messages."""

from __future__ import annotations

import pytest

from alerter.incidents import IncidentUpdate
from alerter.messages import (
    ELLIPSIS,
    ESTIMATE_LINE,
    WORD_JOINER,
    RenderOptions,
    escape,
    human_number,
    percent_above,
    render_demo_messages,
    render_update,
)
from alerter.records import Alert, SpillWarning, Upstream

H = "2026-11-20T10:00:00Z"

CRAFTED = [
    # (node id, must not appear literally in the output, what must appear)
    ("@here", ["@here"], "here"),
    ("@everyone please", ["@everyone"], "everyone"),
    ("<!channel>", ["<!channel>", "<"], "channel"),
    ("<https://evil.example|click>", ["<https://", "https://evil"], "evil"),
    ("[click](https://evil.example)", ["](https://"], "click"),
    ("/a\nFAKE LINE", ["\n"], "FAKE LINE"),
    ("/a\r\n\u2028x\u202ey", ["\r", "\n", "\u2028", "\u202e"], "x"),
    ("www.evil.example", ["www.evil"], "evil"),
    ("#general", ["#general"], "general"),
]


@pytest.mark.parametrize("markup", ["plain", "markdown"])
@pytest.mark.parametrize(("node", "forbidden", "kept"), CRAFTED)
def test_crafted_ids_render_as_literal_text(node: str, forbidden: list[str], kept: str, markup: str) -> None:
    out = escape(node, 80, markup)
    for bad in forbidden:
        assert bad not in out, (node, out)
    assert kept in out.replace(WORD_JOINER, "")
    assert "\n" not in out


@pytest.mark.parametrize(("node", "forbidden"), [("[click](https://evil.example)", ["[click]", "](h"]),
                                                 ("*bold* _it_ `code` ~x~ |t|", ["*bold*", "_it_", "`code`", "~x~"])])
def test_markdown_flavour_escapes_markup(node: str, forbidden: list[str]) -> None:
    out = escape(node, 80, "markdown")
    assert not any(bad in out for bad in forbidden), out


@pytest.mark.parametrize(("node", "limit", "expected"), [
    ("/" + "a" * 200, 10, "/aaaaaaaa" + ELLIPSIS),
    ("/short", 10, "/short"),
    ("/ニュース/東京の天気/今日の記事一覧", 8, "/ニュース/東" + ELLIPSIS),
    ("/новости/погода", 80, "/новости/погода"),
    ("/أخبار/طقس", 6, "/أخبا" + ELLIPSIS),
    ("/🙂🙂🙂🙂", 3, "/🙂" + ELLIPSIS),
])
def test_long_and_non_latin_ids_are_cut_with_an_ellipsis(node: str, limit: int, expected: str) -> None:
    out = escape(node, limit)
    assert out == expected and len(out) <= limit


@pytest.mark.parametrize(("value", "text"), [(0, "0"), (7.4, "7"), (999, "999"), (1000, "1k"), (1234, "1.2k"),
                                              (9960, "10k"), (45_600, "46k"), (1_250_000, "1.2M"),
                                              (-2400, "-2.4k"), (float("nan"), "n/a")])
def test_human_numbers(value: float, text: str) -> None:
    assert human_number(value) == text


@pytest.mark.parametrize(("obs", "exp", "text"), [(340, 100, "+240%"), (100, 100, "+0%"), (35, 100, "-65%"),
                                                  (10, 0, "from ~0"), (1_000_000, 10, "+99999x")])
def test_percent_above(obs: float, exp: float, text: str) -> None:
    assert percent_above(obs, exp) == text


def _alert(node: str, excess: float = 2400) -> Alert:
    return Alert.build(node=node, hour=H, kind="surge", observed=1000 + excess, expected=1000, band_low=800,
                       band_high=1300, score=9, rule="default", streak=2,
                       upstream=(Upstream("/home", excess * 0.55, 0.55, "new"), Upstream("/search", 300, 0.12)),
                       unexplained=excess * 0.33, origin="mixed")


def test_incident_message_has_every_part_and_escapes_ids() -> None:
    evil = "/x@everyone<!channel>\n"
    upd = IncidentUpdate(incident="surge-20261120T10-abc123", revision=1, hour=H, state="open", direction="surge",
                         root="/news", start="2026-11-20T09:00:00Z", members=("/news", evil),
                         new_members=("/news", evil), total_excess=4800)
    spill = SpillWarning("/checkout", "2026-11-20T11:00:00Z", 5100, 4000, upd.incident, "/news")
    text = render_update(upd, [_alert("/news"), _alert(evil)], [spill], RenderOptions(markup="markdown")).text
    for part in ("/news", "observed 3.4k vs expected 1k", "band 800 to 1.3k", "+240%", "mixed",
                 "since 2026-11-20 09:00 UTC", "via /home: ~1.3k visits (55% of the excess, new link)",
                 "spill-over: /checkout forecast 5.1k/h", ESTIMATE_LINE, "**[SURGE NEW]**"):
        assert part in text, part
    assert "@everyone" not in text and "<!channel>" not in text
    assert text.count("\n") == len(text.splitlines()) - 1  # the crafted newline did not add a line of its own
    assert all(not line.startswith(("<", "@")) for line in text.splitlines())


def test_long_message_keeps_the_estimate_line() -> None:
    members = tuple(f"/n{i:04d}" for i in range(300))
    upd = IncidentUpdate("i", 2, H, "growing", "surge", members[0], H, members, members[1:], 1e6)
    out = render_update(upd, [_alert(m) for m in members], (), RenderOptions(max_message_chars=400,
                                                                              max_members=300)).text
    assert len(out) <= 400 and out.endswith(ESTIMATE_LINE) and ELLIPSIS in out


def test_demo_messages_one_per_update_in_order() -> None:
    ups = [IncidentUpdate("b", 1, "2026-11-20T11:00:00Z", "open", "surge", "/b", "2026-11-20T11:00:00Z",
                          ("/b",), ("/b",), 10),
           IncidentUpdate("a", 1, H, "open", "surge", "/news", H, ("/news",), ("/news",), 2400),
           IncidentUpdate("a", 2, "2026-11-20T13:00:00Z", "closed", "surge", "/news", H, ("/news",), (), 2400)]
    msgs = render_demo_messages([_alert("/news")], ups)
    assert len(msgs) == 3
    assert "incident a" in msgs[0] and "observed 3.4k" in msgs[0]
    assert "incident b" in msgs[1] and "CLOSED" in msgs[2]
    assert all(ESTIMATE_LINE in m for m in msgs)


@pytest.mark.parametrize(("revision", "state", "direction", "tag"), [
    (1, "open", "surge", "[SURGE NEW]"),
    (2, "growing", "surge", "[SURGE GROWING]"),
    (3, "subsiding", "surge", "[SURGE SUBSIDING]"),
    (4, "open", "surge", "[SURGE OPEN]"),  # re-activated after subsiding: not a new incident
    (2, "open", "drop", "[DROP OPEN]"),
    (5, "closed", "drop", "[DROP CLOSED]"),
])
def test_header_says_new_only_on_the_first_revision(revision: int, state: str, direction: str, tag: str) -> None:
    upd = IncidentUpdate("inc-7", revision, H, state, direction, "/news", H, ("/news",), (), 2400)
    rendered = render_update(upd, [_alert("/news")])
    assert rendered.title.startswith(tag + " incident inc-7")
    assert rendered.text.splitlines()[0] == rendered.title
    assert ("NEW]" in rendered.text) == (revision == 1)


def test_closed_and_new_node_lists_say_how_many_were_left_out() -> None:
    members = tuple(f"/n{i:02d}" for i in range(11))
    closed = IncidentUpdate("i", 4, H, "closed", "surge", members[0], H, members, (), 5000)
    text = render_update(closed, (), (), RenderOptions(max_members=8)).text
    assert "last members: /n00, /n01, /n02, /n03, /n04, /n05, /n06, /n07 and 3 more" in text
    grown = IncidentUpdate("i", 2, H, "growing", "surge", members[0], H, members, members[1:], 5000)
    assert "new nodes: /n01, /n02 and 8 more" in render_update(grown, (), (), RenderOptions(max_members=2)).text
    assert "; 11 nodes; excess +5k visits" in text


def test_visit_counts_read_as_singular_or_plural() -> None:
    one = Alert.build(node="/x", hour=H, kind="surge", observed=201, expected=100, band_low=80, band_high=150,
                      score=6, rule="default", streak=1, upstream=(Upstream("/home", 100, 0.99),), unexplained=1.0,
                      origin="propagated")
    lines = render_update(IncidentUpdate("i", 1, H, "open", "surge", "/x", H, ("/x",), ("/x",), 101), [one]).text
    assert "unexplained: ~1 visit\n" in lines and "via /home: ~100 visits (99% of the excess)" in lines
