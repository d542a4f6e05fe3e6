"""HTML to ``PageText``: the title, description, keywords, language, headings, main body
text, anchor texts and outgoing link domains of one page, for the page model.

The input is text the fetcher has already decoded (charset sniffing is the fetcher's job,
``cascade.fetch.charset``); bytes are accepted and read as UTF-8 with replacement.
``extract`` never raises: malformed, truncated, deeply nested, huge or binary input gives a
bounded ``PageText`` whose ``notes`` say which cap was hit or what went wrong.

How the main body is found (our own design, on lxml alone):

1. Parse with libxml2's HTML parser in recovery mode (no network, no huge-tree mode, so the
   parser itself bounds depth at 256 and text node sizes), comments and processing
   instructions removed while parsing.
2. Drop what is never page text: script, style, noscript, template, svg, math, iframe,
   object, embed, canvas, form controls; elements marked ``hidden``, ``aria-hidden="true"``
   or styled ``display:none`` / ``visibility:hidden``.
3. Drop boilerplate: nav, header, footer, aside, and elements whose class or id words name
   a menu, sidebar, breadcrumb, share bar, comments, cookie banner, advert, newsletter box
   and the like. An element is kept anyway when its class/id also names content ("post",
   "article", "main", "content", ...), when it is ``<body>``/``<html>``/``<main>``/
   ``<article>``, or when it holds most of the page's text with few links.
4. Score paragraph containers: each text block of 25+ characters gives its parent 1 point,
   plus one per comma, plus up to 3 for length, and half that to the grandparent and a
   sixth to the great-grandparent; containers are weighted by their tag and class/id words
   and multiplied by (1 - link density). The best container is kept with those siblings that
   score at least a fifth of it or read like prose paragraphs; when the article is split
   over repeated sibling containers of one kind (same tag and first class), the level
   within four steps up that collects the most paragraph text is taken instead.
5. Emit the kept nodes' text as blocks (one per block-level element or ``<br>``), dropping
   blocks that are mostly link text. With no candidate (a page of lists and tables) or
   under 250 characters chosen, the whole cleaned body is emitted the same way.

Why our own code and not trafilatura on the hot path: trafilatura is the best open-source
article extractor we measured (``benchmarks/extract.py``), and about as accurate as this
code on the reference pages (token F1 0.957 against our 0.961), but it returns the article
text only, its default mode runs fallback extractors per page, and it is slower: we measured
2.2x its default and 1.7x its ``fast=True`` mode in pages/s. Its fast mode still returns no
headings, anchors, link domains or caps. The page model wants more of the page than the
article (anchor texts and outgoing domains say a lot about a site's category), bounded work
on hostile input, and one parse for everything. See ``docs/extraction.md`` for the figures.
"""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import asdict, dataclass, field
from typing import Any

from lxml import etree

from cascade.errors import InvalidURL
from cascade.urls import normalize

__all__ = ["DEFAULT_LIMITS", "ExtractLimits", "PageText", "extract", "extract_fetch"]


@dataclass(frozen=True)
class ExtractLimits:
    """Caps on the work and the output of one ``extract`` call (change with
    ``dataclasses.replace``)."""

    max_input_chars: int = 2_000_000  # longer input is cut before parsing
    max_elements: int = 60_000  # more elements: the plain body walk over the first ones only
    max_body_chars: int = 100_000
    max_anchors: int = 400
    max_headings: int = 50
    max_keywords: int = 50
    max_link_domains: int = 100
    max_field_chars: int = 2_000  # title, description, each heading, keyword and anchor
    min_block_chars: int = 25  # shorter blocks do not count as paragraphs when scoring

    def __post_init__(self) -> None:
        for name in ("max_input_chars", "max_elements", "max_body_chars", "max_anchors",
                     "max_headings", "max_keywords", "max_link_domains", "max_field_chars",
                     "min_block_chars"):
            value = getattr(self, name)
            if not isinstance(value, int) or isinstance(value, bool) or value < 1:
                raise ValueError(f"ExtractLimits.{name} must be a positive integer, "
                                 f"got {value!r}")
        if self.max_input_chars < 1024:
            raise ValueError("ExtractLimits.max_input_chars must be at least 1024 "
                             f"(got {self.max_input_chars}): no HTML page fits in less")


DEFAULT_LIMITS = ExtractLimits()


@dataclass(frozen=True)
class PageText:
    """What the page model reads from one page. Every text field is whitespace-normalized;
    every tuple is bounded by ``ExtractLimits``."""

    title: str = ""
    description: str = ""
    keywords: tuple[str, ...] = ()
    lang: str = ""
    headings: tuple[str, ...] = ()
    body: str = ""
    anchors: tuple[str, ...] = ()
    link_domains: tuple[str, ...] = ()
    html_chars: int = 0
    n_elements: int = 0
    text_chars: int = 0
    n_links: int = 0
    kind: str = "empty"  # "html", "text" (a plain-text body passed through) or "empty"
    notes: tuple[str, ...] = field(default_factory=tuple)
    url: str | None = None

    @property
    def word_count(self) -> int:
        """Words in the body (runs of word characters)."""
        return len(_WORD.findall(self.body))

    def is_thin(self, min_words: int = 50) -> bool:
        """True when the body is too short for the page model to rely on."""
        return self.word_count < min_words

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        for key, value in out.items():
            if isinstance(value, tuple):
                out[key] = list(value)
        out["word_count"] = self.word_count
        return out


# --- what is dropped -------------------------------------------------------------------

def _words(text: str) -> frozenset[str]:
    return frozenset(text.split())


_JUNK_TAGS = ("script", "style", "noscript", "template", "svg", "math", "iframe", "object",
              "embed", "canvas", "input", "button", "select", "option", "optgroup",
              "textarea", "datalist", "output", "dialog", "link", "meta", "base", "audio",
              "video", "source", "track", "map", "area", "head")
_BOILERPLATE_TAGS = frozenset({"nav", "header", "footer", "aside", "menu"})
_KEEP_TAGS = frozenset({"html", "body", "main", "article"})
# class/id words that name page furniture (compared as whole words of the class/id)
_BOILERPLATE_WORDS = _words("""
    menu menus nav navbar navigation navlinks breadcrumb breadcrumbs footer sidebar sidebars
    share sharing shares sharebar social socials related comment comments cookie cookies
    consent banner banners advert adverts advertisement advertising ad ads adslot sponsor
    sponsored promo promos promotion subscribe subscription newsletter popup modal masthead
    widget widgets outbrain taboola recommended recommendations trending signup login
    toolbar pagination pager skip topbar most popular tags tagcloud disqus overlay
    print email follow byline dateline timestamp author-bio
""")
# substrings that are boilerplate wherever they appear in a class/id
_BOILERPLATE_PARTS = ("sidebar", "breadcrumb", "newsletter", "cookie", "advert", "footer",
                      "navbar", "navigation", "socialmedia", "sharebar", "subscribe",
                      "taboola", "outbrain", "related", "promo", "social", "share-",
                      "comment")
# class/id words that name the content itself: such an element is never dropped
_CONTENT_WORDS = _words("""
    article articles content contents main post posts entry story stories body text blog
    hentry page prose richtext paragraph
""")
_POSITIVE_WORDS = _words("""
    article body content entry hentry main page post text blog story prose richtext
""")
_NEGATIVE_WORDS = _BOILERPLATE_WORDS | _words("""
    hidden meta caption credit extra foot link links shopping tool
""")

_HIDDEN_XPATH = etree.XPath(
    "//*[@hidden or @aria-hidden='true' or contains(translate(@style,"
    " 'ABCDEFGHIJKLMNOPQRSTUVWXYZ \t\n\r', 'abcdefghijklmnopqrstuvwxyz'), 'display:none')"
    " or contains(translate(@style, 'ABCDEFGHIJKLMNOPQRSTUVWXYZ \t\n\r',"
    " 'abcdefghijklmnopqrstuvwxyz'), 'visibility:hidden')]")
_NAMED_XPATH = etree.XPath("//*[@class or @id]")
_TAG_XPATH = etree.XPath("//nav|//header|//footer|//aside|//menu")

# --- how text is cut into blocks -------------------------------------------------------

_BLOCK_TAGS = _words("""
    address article blockquote body center dd details dir div dl dt fieldset figcaption
    figure form h1 h2 h3 h4 h5 h6 header hr html li main ol p pre section summary table
    tbody td tfoot th thead tr ul caption footer nav aside legend
""")
_PARAGRAPH_TAGS = ("p", "pre", "blockquote", "td", "li", "dd")
_HEADING_TAGS = ("h1", "h2", "h3")
_TAG_WEIGHT = {"div": 5, "article": 10, "main": 5, "section": 3, "pre": 3, "td": 3,
               "blockquote": 3, "form": -3, "ol": -3, "ul": -3, "dl": -3, "dd": -3,
               "dt": -3, "li": -3, "address": -3, "h1": -5, "h2": -5, "h3": -5, "h4": -5,
               "h5": -5, "h6": -5, "th": -5}

_MIN_MAIN_CHARS = 250
_WORD = re.compile(r"\w+")
_NAME_SPLIT = re.compile(r"[^a-z0-9]+")
_CAMEL = re.compile(r"([a-z0-9])([A-Z])")
_CONTROL = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]")
_COMMAS = re.compile(r"[,\u060c\u3001\uff0c]")
_SENTENCE_END = re.compile(r"[.!?\u3002]['\"\u201d\u2019)]?$")
_XML_DECL = re.compile(r"^\s*<\?xml[^>]*>", re.I)


def _clean(text: str | None) -> str:
    return " ".join(text.split()) if text else ""


def _cap(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[:limit].rstrip()


def _name_words(el: etree._Element) -> tuple[set[str], str]:
    """The class and id of an element as a set of lower-case words, and as one string."""
    raw = f"{el.get('class') or ''} {el.get('id') or ''}"
    if not raw.strip():
        return set(), ""
    joined = _CAMEL.sub(r"\1-\2", raw).lower()
    words = set(_NAME_SPLIT.split(joined))
    words.discard("")
    return words, joined


# --- the entry points ------------------------------------------------------------------


def extract(
    html: str | bytes,
    *,
    url: str | None = None,
    content_type: str | None = None,
    limits: ExtractLimits = DEFAULT_LIMITS,
) -> PageText:
    """Read one page into a ``PageText``. Never raises; problems and caps go in ``notes``."""
    notes: list[str] = []
    try:
        if isinstance(html, bytes | bytearray | memoryview):
            html = bytes(html).decode("utf-8", errors="replace")
        elif not isinstance(html, str):
            return PageText(notes=("not-text-input",), url=url)
        html_chars = len(html)
        if html_chars > limits.max_input_chars:
            html = html[: limits.max_input_chars]
            notes.append("input-capped")
        if not html.strip():
            return PageText(html_chars=html_chars, kind="empty", notes=tuple(notes), url=url)
        if _looks_binary(html):
            notes.append("binary-input")
            return PageText(html_chars=html_chars, kind="empty", notes=tuple(notes), url=url)
        mime = (content_type or "").split(";", 1)[0].strip().lower()
        if mime == "text/plain" or (mime and not _looks_like_markup_type(mime)
                                    and "<" not in html[:4096]):
            return _plain_text(html, html_chars, notes, url, limits)
        return _extract_html(html, html_chars, notes, url, limits)
    except Exception as exc:  # noqa: BLE001 - the contract is "never raises"
        notes.append(f"parse-failed:{type(exc).__name__}")
        return PageText(html_chars=len(html) if isinstance(html, str) else 0,
                        notes=tuple(notes), url=url)


def extract_fetch(result: Any, *, limits: ExtractLimits = DEFAULT_LIMITS) -> PageText:
    """``extract`` on a ``cascade.fetch.outcomes.FetchResult``; its final URL is the base for
    link domains. A result without text gives an empty ``PageText`` with a note."""
    url = getattr(result, "final_url", None) or getattr(result, "url", None)
    text = getattr(result, "text", None)
    if text is None:
        outcome = getattr(result, "outcome", None)
        note = f"no-text:{outcome}" if outcome is not None else "no-text"
        return PageText(notes=(note,), url=url)
    return extract(text, url=url, content_type=getattr(result, "content_type", None),
                   limits=limits)


def _looks_binary(text: str) -> bool:
    """Bytes that were never text (an image, a compressed body): many control characters or
    replacement characters at the start."""
    head = text[:4096]
    bad = len(_CONTROL.findall(head)) + head.count("\ufffd")
    return bad > 0.1 * len(head)


def _looks_like_markup_type(mime: str) -> bool:
    return "html" in mime or "xml" in mime


def _plain_text(html: str, html_chars: int, notes: list[str], url: str | None,
                limits: ExtractLimits) -> PageText:
    text = _CONTROL.sub("", html)
    lines = [_clean(line) for line in text.splitlines()]
    body = "\n".join(line for line in lines if line)
    if len(body) > limits.max_body_chars:
        body = body[: limits.max_body_chars]
        notes.append("body-capped")
    return PageText(body=body, html_chars=html_chars, text_chars=len(body),
                    kind="text" if body else "empty", notes=tuple(notes), url=url)


def _parse(html: str, notes: list[str]) -> etree._Element | None:
    html = _XML_DECL.sub("", html, count=1)
    if _CONTROL.search(html):
        html = _CONTROL.sub("", html)
    data = html.encode("utf-8", errors="replace")
    parser = etree.HTMLParser(recover=True, no_network=True, huge_tree=False,
                              remove_comments=True, remove_pis=True, encoding="utf-8",
                              default_doctype=False)
    try:
        root = etree.fromstring(data, parser)
    except (etree.ParserError, etree.XMLSyntaxError, ValueError):
        root = None
    for entry in parser.error_log:
        if "Excessive depth" in entry.message:
            notes.append("depth-capped")
            break
    if root is None:
        return _parse_fallback(html, notes)
    return root


def _parse_fallback(html: str, notes: list[str]) -> etree._Element | None:
    """When libxml2 gives no tree, rebuild one from BeautifulSoup's lenient parse (off the
    hot path: it is only reached for input lxml refuses)."""
    try:
        from bs4 import BeautifulSoup

        soup = BeautifulSoup(html, "html.parser")
        text = soup.get_text("\n")
    except Exception:  # noqa: BLE001
        notes.append("parse-failed")
        return None
    root = etree.Element("html")
    body = etree.SubElement(root, "body")
    for line in text.splitlines():
        line = _CONTROL.sub("", line).strip()
        if line:
            etree.SubElement(body, "p").text = line
    notes.append("parsed-by-fallback")
    return root


def _extract_html(html: str, html_chars: int, notes: list[str], url: str | None,
                  limits: ExtractLimits) -> PageText:
    root = _parse(html, notes)
    if root is None:
        return PageText(html_chars=html_chars, notes=tuple(notes), url=url)
    n_elements = 0
    for _ in root.iter():
        n_elements += 1
    meta = _metadata(root, limits)
    etree.strip_elements(root, *_JUNK_TAGS, with_tail=False)
    for el in _HIDDEN_XPATH(root):
        _drop(el)
    anchors, link_domains, n_links = _links(root, url, limits)
    capped = n_elements > limits.max_elements
    body_el = root.find("body")
    if body_el is None:
        body_el = root
    if capped:
        notes.append("element-capped")
        blocks = _blocks(body_el, limits.max_elements)
    else:
        _drop_boilerplate(root)
        blocks = _main_blocks(body_el, limits)
    headings = _headings(body_el, limits)
    body, body_capped = _join_blocks(blocks, limits.max_body_chars)
    if body_capped:
        notes.append("body-capped")
    title = meta["title"]
    if not title and headings:
        title = headings[0]
    return PageText(
        title=title, description=meta["description"], keywords=meta["keywords"],
        lang=meta["lang"], headings=headings, body=body, anchors=anchors,
        link_domains=link_domains, html_chars=html_chars, n_elements=n_elements,
        text_chars=len(body), n_links=n_links,
        kind="html" if (body or title or meta["description"] or anchors) else "empty",
        notes=tuple(notes), url=url)


def _drop(el: etree._Element) -> None:
    """Remove an element but keep its tail text in the document."""
    parent = el.getparent()
    if parent is None:
        return
    tail = el.tail
    if tail and tail.strip():
        prev = el.getprevious()
        if prev is not None:
            prev.tail = (prev.tail or "") + tail
        else:
            parent.text = (parent.text or "") + tail
    parent.remove(el)


# --- head: title, description, keywords, language --------------------------------------


def _metadata(root: etree._Element, limits: ExtractLimits) -> dict[str, Any]:
    title = ""
    el = root.find(".//title")
    if el is not None:
        title = _clean(el.text)
    description = og_description = og_title = keywords_text = ""
    lang = _clean(root.get("lang") or root.get("xml:lang") or "")
    for m in root.iter("meta"):
        key = (m.get("name") or m.get("property") or m.get("http-equiv") or "").strip().lower()
        if not key:
            continue
        content = m.get("content") or ""
        if key == "description" and not description:
            description = _clean(content)
        elif key == "og:description" and not og_description:
            og_description = _clean(content)
        elif key == "og:title" and not og_title:
            og_title = _clean(content)
        elif key == "keywords" and not keywords_text:
            keywords_text = content
        elif key == "content-language" and not lang:
            lang = _clean(content).split(",")[0].strip()
    keywords: list[str] = []
    seen: set[str] = set()
    for word in keywords_text.split(","):
        word = _cap(_clean(word), limits.max_field_chars)
        if word and word.lower() not in seen:
            seen.add(word.lower())
            keywords.append(word)
            if len(keywords) >= limits.max_keywords:
                break
    return {"title": _cap(title or og_title, limits.max_field_chars),
            "description": _cap(description or og_description, limits.max_field_chars),
            "keywords": tuple(keywords), "lang": _cap(lang.lower(), 35)}


# --- links ----------------------------------------------------------------------------


def _links(root: etree._Element, url: str | None,
           limits: ExtractLimits) -> tuple[tuple[str, ...], tuple[str, ...], int]:
    own = None
    if url:
        try:
            own = normalize(url).registered_domain
        except InvalidURL:
            own = None
    anchors: list[str] = []
    seen_anchor: set[str] = set()
    domains: Counter[str] = Counter()
    n_links = 0
    for a in root.iter("a"):
        href = (a.get("href") or "").strip()
        if not href:
            continue
        n_links += 1
        if len(anchors) < limits.max_anchors:
            text = _cap(_clean(a.xpath("string()")), limits.max_field_chars)
            if text and text.lower() not in seen_anchor:
                seen_anchor.add(text.lower())
                anchors.append(text)
        low = href[:8].lower()
        if low.startswith(("http://", "https://")) or href.startswith("//"):
            try:
                domain = normalize(href if not href.startswith("//")
                                   else "http:" + href).registered_domain
            except InvalidURL:
                continue
            if domain and domain != own:
                domains[domain] += 1
    top = tuple(d for d, _ in sorted(domains.items(), key=lambda kv: (-kv[1], kv[0]))
                [: limits.max_link_domains])
    return tuple(anchors), top, n_links


# --- boilerplate -------------------------------------------------------------------------


def _is_boilerplate_name(words: set[str], joined: str) -> bool:
    if not words or words & _CONTENT_WORDS:
        return False
    if words & _BOILERPLATE_WORDS:
        return True
    return any(part in joined for part in _BOILERPLATE_PARTS)


def _drop_boilerplate(root: etree._Element) -> None:
    """Remove page furniture, but never an element that carries most of the page's prose."""
    body = root.find("body")
    total = _text_len(body if body is not None else root)
    candidates: list[etree._Element] = []
    for el in _TAG_XPATH(root):
        candidates.append(el)
    for el in _NAMED_XPATH(root):
        tag = el.tag
        if not isinstance(tag, str) or tag in _KEEP_TAGS:
            continue
        words, joined = _name_words(el)
        if _is_boilerplate_name(words, joined):
            candidates.append(el)
    removed: set[etree._Element] = set()
    for el in candidates:
        if el in removed or any(a in removed for a in el.iterancestors()):
            continue
        if total > 500:
            size = _text_len(el)
            if size > 0.4 * total and _link_density(el, size) < 0.5:
                continue  # a mislabelled article container: keep it
        removed.add(el)
    for el in removed:
        _drop(el)


def _text_len(el: etree._Element) -> int:
    return len(_clean(el.xpath("string()")))


def _link_density(el: etree._Element, size: int | None = None) -> float:
    size = _text_len(el) if size is None else size
    if size <= 0:
        return 0.0
    links = sum(_text_len(a) for a in el.iter("a"))
    return min(1.0, links / size)


# --- the main part ----------------------------------------------------------------------


def _main_blocks(body: etree._Element, limits: ExtractLimits) -> list[str]:
    scores: dict[etree._Element, float] = {}
    prose: dict[etree._Element, int] = {}  # paragraph characters under each node
    for el in body.iter(*_PARAGRAPH_TAGS, "div", "section"):
        # a div holding text directly counts as a paragraph of the text not inside a block
        text = (_direct_text(el) if el.tag in ("div", "section")
                else _clean(el.xpath("string()")))
        if len(text) < limits.min_block_chars:
            continue
        score = 1 + len(_COMMAS.findall(text)) + min(len(text) // 100, 3)
        target = el if el.tag in ("div", "section") else el.getparent()
        for level, node in enumerate(_ancestors(target, 3)):
            if node not in scores:
                scores[node] = _initial_score(node)
            scores[node] += score / (1 if level == 0 else 2 if level == 1 else 3 * level)
        node = el
        while node is not None:
            prose[node] = prose.get(node, 0) + len(text)
            if node is body:
                break
            node = node.getparent()
    if not scores:
        return _blocks(body, None)
    best, best_score = None, float("-inf")
    final: dict[etree._Element, float] = {}
    for node, score in scores.items():
        value = score * (1 - _link_density(node))
        final[node] = value
        if value > best_score:
            best, best_score = node, value
    assert best is not None
    nodes = _repeated_level(best, prose, body)
    if nodes is None:
        nodes = [best]
        parent = best.getparent()
        if parent is not None and best is not body:
            threshold = max(10.0, best_score * 0.2)
            nodes = [sib for sib in parent if isinstance(sib.tag, str) and (
                sib is best or final.get(sib, float("-inf")) >= threshold
                or _is_prose(sib, prose))]
    blocks: list[str] = []
    for node in nodes:
        blocks.extend(_blocks(node, None))
    if sum(len(b) for b in blocks) < _MIN_MAIN_CHARS:
        return _blocks(body, None)  # too little to be a main part: keep the whole page
    return blocks


def _direct_text(el: etree._Element) -> str:
    parts = [el.text or ""]
    for child in el:
        tag = child.tag
        if isinstance(tag, str) and tag not in _BLOCK_TAGS and tag not in _PARAGRAPH_TAGS:
            parts.append(child.xpath("string()"))
        parts.append(child.tail or "")
    return _clean("".join(parts))


def _kind(el: etree._Element) -> tuple[str, str]:
    """Tag and first class name: what repeated containers of one kind share."""
    classes = (el.get("class") or "").split()
    return el.tag, classes[0] if classes else ""


def _repeated_level(best: etree._Element, prose: dict[etree._Element, int],
                    body: etree._Element) -> list[etree._Element] | None:
    """When the article is split over sibling containers of one kind (a "card" per
    paragraph, a "zn-body__paragraph" per paragraph), the containers at that level, in
    order: of the levels within four steps up from ``best`` that have such siblings, the
    one that collects the most paragraph text. None when there is no such level."""
    node = best
    found: list[etree._Element] | None = None
    found_prose = 0
    for _ in range(4):
        parent = node.getparent()
        if parent is None or node is body:
            break
        kind = _kind(node)
        similar = kind[1] and any(
            sib is not node and isinstance(sib.tag, str) and _kind(sib) == kind
            and prose.get(sib, 0) > 0 for sib in parent)
        if similar:
            keep = []
            for sib in parent:
                if not isinstance(sib.tag, str):
                    continue
                if sib is node or _kind(sib) == kind:
                    if prose.get(sib, 0) > 0 and _link_density(sib) < 0.3:
                        keep.append(sib)
                elif _is_prose(sib, prose):
                    keep.append(sib)
            amount = sum(prose.get(k, 0) for k in keep)
            if amount > found_prose:
                found, found_prose = keep, amount
        if parent is body:
            break
        node = parent
    return found


def _ancestors(el: etree._Element | None, count: int) -> list[etree._Element]:
    out = []
    while el is not None and len(out) < count:
        if isinstance(el.tag, str):
            out.append(el)
        if el.tag == "body":
            break
        el = el.getparent()
    return out


def _initial_score(el: etree._Element) -> float:
    score = float(_TAG_WEIGHT.get(el.tag, 0))
    words, _ = _name_words(el)
    if words:
        if words & _POSITIVE_WORDS:
            score += 25
        if words & _NEGATIVE_WORDS:
            score -= 25
    return score


def _is_prose(el: etree._Element, prose: dict[etree._Element, int]) -> bool:
    """A sibling of the main container that reads like more of the article: a paragraph,
    or a container whose text is mostly paragraphs, with few links."""
    if el.tag == "p":
        text = _clean(el.xpath("string()"))
        if not text:
            return False
        density = _link_density(el, len(text))
        if len(text) > 80:
            return density < 0.25
        return density == 0 and bool(_SENTENCE_END.search(text))
    amount = prose.get(el, 0)
    if amount < 100:
        return False
    size = _text_len(el)
    return size > 0 and amount >= 0.7 * size and _link_density(el, size) < 0.25


def _blocks(node: etree._Element, max_events: int | None) -> list[str]:
    """The text of ``node`` cut into blocks at block-level elements and ``<br>``; blocks
    that are mostly link text are left out."""
    blocks: list[str] = []
    parts: list[str] = []
    link_chars = 0
    link_depth = 0
    events = 0

    def flush() -> None:
        nonlocal link_chars
        if parts:
            text = _clean("".join(parts))
            parts.clear()
            if text and not (link_chars > 0.5 * len(text) and len(text) < 400):
                blocks.append(text)
        link_chars = 0

    for event, el in etree.iterwalk(node, events=("start", "end")):
        events += 1
        if max_events is not None and events > 2 * max_events:
            break
        tag = el.tag
        if not isinstance(tag, str):
            continue
        if event == "start":
            if tag in _BLOCK_TAGS or tag == "br":
                flush()
            if tag == "a":
                link_depth += 1
            if el.text:
                parts.append(el.text)
                if link_depth:
                    link_chars += len(el.text.strip())
        else:
            if tag == "a":
                link_depth -= 1
            if tag in _BLOCK_TAGS:
                flush()
            elif tag in ("td", "th"):
                parts.append(" ")
            if el.tail and el is not node:
                parts.append(el.tail)
                if link_depth:
                    link_chars += len(el.tail.strip())
    flush()
    return blocks


def _headings(body: etree._Element, limits: ExtractLimits) -> tuple[str, ...]:
    out: list[str] = []
    seen: set[str] = set()
    for el in body.iter(*_HEADING_TAGS):
        text = _cap(_clean(el.xpath("string()")), limits.max_field_chars)
        if text and text.lower() not in seen:
            seen.add(text.lower())
            out.append(text)
            if len(out) >= limits.max_headings:
                break
    return tuple(out)


def _join_blocks(blocks: list[str], max_chars: int) -> tuple[str, bool]:
    out: list[str] = []
    size = 0
    for block in blocks:
        if size + len(block) + 1 > max_chars:
            room = max_chars - size - 1
            if room > 0:
                out.append(block[:room])
            return "\n".join(out), True
        out.append(block)
        size += len(block) + 1
    return "\n".join(out), False
