"""Invented web pages for the demo scenario's URLs, deterministic from each URL's page seed.

A page looks like a page: a title, a meta description, a navigation menu and a footer that
every site repeats (boilerplate), headings, paragraphs, links, scripts and styles to strip,
and a spread of sizes. Its words come from its true category, so a page can reveal what an
opaque URL hides; a share of pages say little (login walls, parked domains), as real ones do.
"""

from __future__ import annotations

import html
import random

from cascade.scenario.telemetry import CATEGORY_WORDS

_FILLER = (
    "the", "a", "of", "and", "to", "in", "for", "with", "on", "at", "from", "by", "about",
    "our", "your", "this", "that", "is", "are", "was", "be", "more", "new", "all", "now",
    "here", "today", "each", "every", "most", "best", "find", "see", "read", "get", "take",
    "make",
)
_NAV = ("Home", "About", "Contact", "Help", "Sitemap", "Privacy", "Terms", "Careers", "Blog")
_THIN_KINDS = ("login", "parked", "placeholder")


def _sentence(r: random.Random, words: tuple[str, ...], length: int) -> str:
    out = []
    for _ in range(length):
        out.append(r.choice(words) if r.random() < 0.45 else r.choice(_FILLER))
    text = " ".join(out)
    return text[:1].upper() + text[1:] + "."


def render_page(url: str, label: str, page_seed: int) -> str:
    """The HTML of the page at ``url`` (its category ``label``), the same every time."""
    r = random.Random(page_seed)
    words = CATEGORY_WORDS.get(label, tuple(_FILLER))
    site_name = " ".join(w.capitalize() for w in r.sample(words, 2))
    kind = "thin" if r.random() < 0.06 else "full"
    head_words = r.sample(words, 3)
    title = f"{head_words[0].capitalize()} {head_words[1]} | {site_name}"
    description = _sentence(r, words, r.randint(8, 16))
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
            heading = " ".join(r.sample(words, 2)).capitalize()
            paras = "".join(f"<p>{html.escape(_sentence(r, words, r.randint(10, 40)))}</p>"
                            for _ in range(r.randint(1, 5)))
            sections.append(f"<section><h2>{html.escape(heading)}</h2>{paras}</section>")
        links = "".join(
            f'<li><a href="/{w}/{r.randint(1, 999)}">{html.escape(w.capitalize())} '
            f'{html.escape(r.choice(words))}</a></li>' for w in r.sample(words, 5))
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
