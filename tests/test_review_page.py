"""The static duplicate report (index/duplicates/review_page.py) on hand-made documents: the words on it
agree with what a quarantine move would do (quarantine.leaving), counts have their plurals, sizes are in
decimal SI units, names break only after / _ - and groups past the page's limit are named."""
from __future__ import annotations

import re
from html.parser import HTMLParser

import pytest
from PIL import Image

from index.duplicates import review_page
from index.duplicates.quarantine import leaving
from index.duplicates.review_words import breakable, count, size_text


def test_sizes_are_decimal_si_with_one_decimal():
    # SI prefixes are powers of ten: kilo = 10^3, mega = 10^6, giga = 10^9 (BIPM, The International
    # System of Units, 9th edition 2019, table 7; from memory). The symbol of kilo is a lower-case k.
    assert size_text(39_100) == "39.1 kB"
    assert size_text(2_400_000) == "2.4 MB"
    assert size_text(40_000) == "40.0 kB"  # never "0.04 MB"
    assert size_text(999_960) == "1.0 MB"  # rounds up into the next unit, not "1000.0 kB"
    assert size_text(1_500_000_000) == "1.5 GB"
    assert size_text(812) == "812 bytes" and size_text(1) == "1 byte" and size_text(None) == "size unknown"


def test_counts_have_their_plurals():
    assert count(1, "pair") == "1 pair" and count(3, "pair") == "3 pairs" and count(0, "file") == "0 files"
    assert count(1, "copy", "copies") == "1 copy" and count(2, "copy", "copies") == "2 copies"


class _Text(HTMLParser):
    """Text of a fragment with the places a line may break (<wbr>) marked as '|'."""

    def __init__(self):
        super().__init__()
        self.out, self.titles = [], []

    def handle_starttag(self, tag, attrs):
        if tag == "wbr":
            self.out.append("|")
        self.titles += [v for k, v in attrs if k == "title"]

    def handle_data(self, data):
        self.out.append(data)


def _parsed(html):
    p = _Text()
    p.feed(html)
    return "".join(p.out), p.titles


@pytest.mark.parametrize("name", ["24S-010_floral_moss-honey_small.jpg", "rescans-2026/scan-0001.jpg",
                                  "IMG20240101123456789012345678.jpg", "a<b>&c.png",
                                  "/srv/studio/averyveryverylongfoldername1234567/x"])
def test_names_break_only_after_a_slash_underscore_or_hyphen(name):
    text, titles = _parsed(breakable(name))
    for i, ch in enumerate(text):
        if ch == "|":
            assert text[i - 1] in "/_-", text  # never inside a word or a number
    runs = re.split(r"[|\s]", text)
    assert max(len(r) for r in runs) <= 22 + 1, text  # every unbroken run fits a card's line
    if text.replace("|", "") == name:
        assert titles == []
    else:  # cut in the middle: the whole name is in the title, both ends are kept
        assert titles == [name] and "\u2026" in text
        stem = text.replace("|", "").split("\u2026")
        assert name.startswith(stem[0]) and name.endswith(stem[1])


def _png(path, colour):
    Image.new("RGB", (40, 30), colour).save(path)
    return str(path)


def _member(mid, path, **more):
    return {"id": mid, "path": path, "score": 1.0, "cosine": 1.0, "width": 40, "height": 30, "size": 39_100,
            "mtime": 1_700_000_000, "sha256": None, "evidence": {"eligible": True}, **more}


@pytest.fixture()
def doc(tmp_path):
    """An exact group whose keeper is a look-alike of a larger file (so the look-alike group's keeper stays
    for both), and a look-alike group of three."""
    a, a_copy, big = (_png(tmp_path / n, (200, 40, 40)) for n in ("a.png", "a-copy.png", "a_large.png"))
    p, q, r = (_png(tmp_path / n, c) for n, c in (("p.png", (0, 90, 0)), ("q.png", (0, 80, 0)), ("r.png", (0, 70, 0))))
    exact = {"id": 1, "kind": "exact", "keeper": 1, "keeper_reason": "oldest modification time",
             "members": [_member(1, a), _member(2, a_copy)], "pairs": None}
    near_a = {"id": 2, "kind": "near", "keeper": 3, "keeper_reason": "largest pixel count",
              "members": [_member(3, big), _member(1, a, score=0.93, cosine=0.97)],
              "pairs": [{"a": 3, "b": 1, "score": 0.93, "cosine": 0.97}]}
    near_p = {"id": 3, "kind": "near", "keeper": 4, "keeper_reason": "lightest compression",
              "members": [_member(4, p), _member(5, q, score=0.91, cosine=0.95), _member(6, r, score=0.9, cosine=0.94)],
              "pairs": [{"a": 4, "b": 5, "score": 0.91, "cosine": 0.95}, {"a": 4, "b": 6, "score": 0.9, "cosine": 0.94},
                        {"a": 5, "b": 6, "score": 0.89, "cosine": 0.93}]}
    return {"db": str(tmp_path / "db"), "layer": "objects", "score": "normalised", "threshold": 0.7,
            "rules": {"exact": "EXACT RULE", "near": "NEAR RULE", "score": "SCORE RULE", "keeper": "KEEPER RULE"},
            "counts": {"images": 9, "groups": 3, "exact": 1, "near": 2, "images_in_groups": 6},
            "groups": [exact, near_a, near_p]}


def _cards(html):
    """(class, decision words, file name) of every card, in page order."""
    return re.findall(r"<li class='file (\w+)'><p class='decision'>([^<]*)</p>.*?<p class='name'>(.*?)</p>", html)


def _render(doc, **how):
    """The page without its embedded thumbnails (base64 text could hold any word)."""
    return re.sub(r'src="data:image/jpeg;base64,[^"]*"', 'src=""', review_page.render(doc, **how))


def test_the_words_on_each_card_are_what_a_move_would_do(doc):
    html = _render(doc)
    cards = _cards(html)
    moving = {f["path"].rsplit("/", 1)[-1] for f in leaving(doc)}
    assert moving == {"a.png", "a-copy.png", "q.png", "r.png"}  # a_large.png stays for a.png and its copy
    for css, words, name in cards:
        name = _parsed(name)[0].replace("|", "")
        assert (css == "moves") == (name in moving), (css, words, name)
        assert words.startswith("would move" if name in moving else "stays")
    stays = {n: w for c, w, n in ((c, w, _parsed(n)[0].replace("|", "")) for c, w, n in cards) if c == "stays"}
    assert stays == {"a_large.png": "stays: largest pixel count", "p.png": "stays: lightest compression"}
    assert "would move: a_<wbr>large.png stays for it (group 2, look-alike)" in html  # the exact group's keeper
    assert "4 files would move" in html
    for kind in ("same bytes", "look-alike"):  # kinds in plain words, not the JSON's exact / near
        assert f"&middot; {kind} &middot;" in html
    assert ">exact<" not in html and ">near<" not in html and "keeper" not in html.lower().replace("keeper rule", "")
    assert "(1 pair)" in html and "(3 pairs)" in html and "1 pairs" not in html
    assert "39.1 kB" in html and "MB" not in html


def test_groups_come_first_and_the_method_last(doc):
    html = _render(doc)
    assert html.index("id='group-1'") < html.index("id='group-3'") < html.index("How these were found")
    assert html.index("How these were found") < html.index("NEAR RULE")  # the full rules are at the end too
    assert "as private as the archive" in html and "not a verdict" in html and "restore MANIFEST" in html


def test_groups_past_the_limit_are_named_and_their_moves_counted(doc):
    html = _render(doc, max_groups=2)
    assert "id='group-3'" not in html and "first 2 of 3 groups" in html and "--apply-unshown" in html
    assert sorted(f["path"].rsplit("/", 1)[-1] for f in review_page.unshown_moves(doc, 2)) == ["q.png", "r.png"]
    assert review_page.unshown_moves(doc, 3) == []
    # a file shown in an earlier group is not counted, even when a later group also holds it
    assert review_page.unshown_moves(doc, 1) == [f for f in leaving(doc) if f["path"].endswith(("q.png", "r.png"))]
