"""Invented web pages for the demo scenario's URLs, deterministic from each URL's page seed.

A page looks like a page: a title, a meta description, a navigation menu and a footer that
every site repeats (boilerplate), headings, paragraphs, links, scripts and styles to strip,
and a spread of sizes. Most of its words are common web and filler words; a minority come
from its true category, so a page can reveal what an opaque URL hides. As on real sites, a
share of pages mix in a second subject, some talk mostly about another category's subject
(a news story about a casino), and some say little (login walls, parked domains).
"""

from __future__ import annotations

import html
import random

from cascade.scenario.telemetry import CATEGORY_WORDS

__all__ = ["MIXED_SHARE", "OFF_TOPIC_SHARE", "THIN_SHARE", "render_page"]

_FILLER = (
    "the", "a", "of", "and", "to", "in", "for", "with", "on", "at", "from", "by", "about",
    "our", "your", "this", "that", "is", "are", "was", "be", "more", "new", "all", "now",
    "here", "today", "each", "every", "most", "best", "find", "see", "read", "get", "take",
    "make",
)
_NAV = ("Home", "About", "Contact", "Help", "Sitemap", "Privacy", "Terms", "Careers", "Blog")
_THIN_KINDS = ("login", "parked", "placeholder")


# Words any kind of site uses, so that topic words are a minority of a page, as on real pages.
_WEB = (
    "page", "site", "online", "service", "information", "account", "update", "member", "team",
    "year", "week", "people", "local", "free", "guide", "list", "story", "photo", "video",
    "offer", "price", "review", "event", "community", "support", "open", "time", "world",
    "city", "family", "help", "share", "contact", "post", "latest", "popular", "start",
)
_CATEGORIES = tuple(sorted(CATEGORY_WORDS))
# How a page can mislead: how often a page talks mostly about another category's subject
# (a news story about a casino, a shop's page about travel gear), how often it mixes in a
# second subject, and how often it says almost nothing.
OFF_TOPIC_SHARE = 0.07
MIXED_SHARE = 0.35
THIN_SHARE = 0.08


def _sentence(r: random.Random, vocab: list[tuple[tuple[str, ...], float]],
              length: int) -> str:
    """``length`` words: each from the first vocabulary whose share wins, else filler."""
    out = []
    for _ in range(length):
        x = r.random()
        for words, share in vocab:
            if x < share:
                out.append(r.choice(words))
                break
            x -= share
        else:
            out.append(r.choice(_FILLER) if r.random() < 0.6 else r.choice(_WEB))
    text = " ".join(out)
    return text[:1].upper() + text[1:] + "."


def _vocabulary(r: random.Random, label: str) -> tuple[list[tuple[tuple[str, ...], float]],
                                                         tuple[str, ...]]:
    """The page's word sources with their shares, and the words its headings lean on."""
    own = CATEGORY_WORDS.get(label, tuple(_FILLER))
    others = [c for c in _CATEGORIES if c != label] or [label]
    topic = r.uniform(0.06, 0.30)
    mode = r.random()
    if mode < OFF_TOPIC_SHARE:
        other = CATEGORY_WORDS.get(r.choice(others), own)
        return [(other, topic), (own, topic * r.uniform(0.05, 0.3))], other
    if mode < OFF_TOPIC_SHARE + MIXED_SHARE:
        other = CATEGORY_WORDS.get(r.choice(others), own)
        return [(own, topic), (other, topic * r.uniform(0.3, 0.9))], own
    return [(own, topic)], own


def render_page(url: str, label: str, page_seed: int) -> str:
    """The HTML of the page at ``url`` (its category ``label``), the same every time."""
    r = random.Random(page_seed)
    vocab, lead = _vocabulary(r, label)
    site_name = " ".join(w.capitalize() for w in r.sample(lead, 1) + r.sample(_WEB, 1))
    kind = "thin" if r.random() < THIN_SHARE else "full"
    head_words = [r.choice(lead) if r.random() < 0.5 else r.choice(_WEB) for _ in range(3)]
    title = f"{head_words[0].capitalize()} {head_words[1]} | {site_name}"
    description = _sentence(r, vocab, r.randint(8, 16))
    nav = "".join(f'<li><a href="/{n.lower()}">{n}</a></li>' for n in _NAV)
    style = "body{font-family:sans-serif;margin:0}nav ul{display:flex}" * r.randint(1, 30)
    script = ("window.dataLayer=window.dataLayer||[];function t(){dataLayer.push(arguments)}"
              * r.randint(1, 40))
    if kind == "thin":
        thin = r.choice(_THIN_KINDS)
        body = {
            "login": "<h1>Sign in</h1><form><input name=user><input type=password name=pw>"
                     "<button>Sign in</button></form>",
            "parked": "<h1>This domain may be for sale</h1><p>Inquire about this domain.</p>",
            "placeholder": "<h1>Coming soon</h1><p>We are building something new.</p>",
        }[thin]
        main = f"<main>{body}</main>"
    else:
        sections = []
        for _ in range(max(1, int(r.lognormvariate(1.2, 0.7)))):
            heading = f"{r.choice(lead)} {r.choice(_WEB)}".capitalize()
            paras = "".join(f"<p>{html.escape(_sentence(r, vocab, r.randint(10, 40)))}</p>"
                            for _ in range(r.randint(1, 5)))
            sections.append(f"<section><h2>{html.escape(heading)}</h2>{paras}</section>")
        links = "".join(
            f'<li><a href="/{w}/{r.randint(1, 999)}">{html.escape(w.capitalize())} '
            f'{html.escape(r.choice(_WEB))}</a></li>'
            for w in r.sample(lead, 3) + r.sample(_WEB, 2))
        main = (f"<main><h1>{html.escape(title.split(' | ')[0])}</h1>"
                f"{''.join(sections)}<aside><ul>{links}</ul></aside></main>")
    hidden = '<div style="display:none">tracking pixel container</div>'
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f"<title>{html.escape(title)}</title>"
        f'<meta name="description" content="{html.escape(description)}">'
        f'<meta name="keywords" content="{html.escape(", ".join(head_words))}">'
        f"<style>{style}</style><script>{script}</script></head><body>"
        f"<header><nav><ul>{nav}</ul></nav></header>{main}{hidden}"
        f"<footer><p>&copy; 2026 {html.escape(site_name)}. All rights reserved.</p>"
        f"<ul>{nav}</ul></footer><!-- page {page_seed} --></body></html>\n"
    )
