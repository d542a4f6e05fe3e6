"""Invented web-filter lookup telemetry for the demo scenario (Tallowmere Rail Cooperative).

The demo needs a lookup log that looks like one: uneven category frequencies, long-tailed
popularity, and a realistic share of URLs whose string says little or nothing about the
page (invented brand names, shared hosting, misleading words). Everything here is invented
and every host ends in a reserved name (``.example``, ``.test``, ``.invalid``,
``example.com/.net/.org``), so no URL points anywhere real.

Each record carries a ``page_seed`` so a later page generator can invent the same page for
the same URL, and a ``signal`` saying how much the URL string gives away.
"""

from __future__ import annotations

import csv
import gzip
import hashlib
import random
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import IO

import numpy as np

from cascade.errors import InputFormatError
from cascade.taxonomy import demo_taxonomy

__all__ = [
    "CATEGORY_WEIGHTS",
    "CATEGORY_WORDS",
    "RESERVED_SUFFIXES",
    "SHARED_HOSTS",
    "SIGNATURE_ONSETS",
    "SIGNALS",
    "TELEMETRY_FIELDS",
    "TelemetryRecord",
    "generate_telemetry",
    "read_telemetry_csv",
    "write_telemetry_csv",
]

SIGNALS: tuple[str, ...] = ("clear", "opaque", "hosting", "misleading")
TELEMETRY_FIELDS: tuple[str, ...] = (
    "url", "label", "count", "seen_at", "site", "signal", "page_seed",
)
RESERVED_SUFFIXES: tuple[str, ...] = (
    ".example", ".test", ".invalid", ".example.com", ".example.net", ".example.org",
)


@dataclass(frozen=True, slots=True)
class TelemetryRecord:
    """One distinct URL in the lookup log, with its true category and first sighting."""

    url: str
    label: str
    count: int
    seen_at: str
    site: str
    signal: str
    page_seed: int


# --------------------------------------------------------------------------------------
# Vocabulary (all invented for the scenario; adult words kept mild and clinical)
# --------------------------------------------------------------------------------------

CATEGORY_WORDS: dict[str, tuple[str, ...]] = {
    "news": (
        "ledger", "bulletin", "gazette", "daily", "report", "herald", "courier", "tribune",
        "chronicle", "dispatch", "press", "headline", "times", "weekly", "journal", "wire",
        "observer", "sentinel", "digest", "briefing", "newsroom", "column", "editorial",
        "story", "morning", "evening", "affairs", "weather", "forecast", "politics",
        "strike", "council", "election", "talks", "opinion", "breaking", "news",
    ),
    "shopping": (
        "cart", "shop", "store", "market", "deals", "bargain", "outlet", "basket",
        "checkout", "price", "sale", "discount", "goods", "emporium", "mart", "bazaar",
        "boutique", "catalog", "order", "buy", "wares", "trader", "coupon", "voucher",
        "parcel", "delivery", "warehouse", "offer", "gift", "retail", "classifieds",
        "listing", "compare",
    ),
    "money": (
        "bank", "banking", "pay", "payments", "loan", "credit", "savings", "invest", "fund",
        "finance", "insurance", "mortgage", "tax", "wallet", "account", "capital", "budget",
        "pension", "broker", "exchange", "trust", "deposit", "interest", "rates", "card",
        "cash", "money", "treasury", "wealth", "portfolio", "premium", "claim", "billing",
        "invoice",
    ),
    "health": (
        "clinic", "health", "care", "medic", "doctor", "nurse", "pharmacy", "remedy",
        "wellness", "fitness", "therapy", "dental", "vision", "symptom", "wellbeing", "cure",
        "vitamin", "diet", "nutrition", "cardio", "gym", "yoga", "physio", "heal",
        "hospital", "patient", "appointment", "prescription", "checkup", "immune", "sleep",
        "allergy",
    ),
    "learning": (
        "academy", "school", "college", "course", "lesson", "tutor", "study", "learn",
        "campus", "library", "scholar", "tutorial", "class", "exam", "quiz", "textbook",
        "research", "thesis", "encyclopedia", "wiki", "reference", "faculty", "university",
        "seminar", "syllabus", "homework", "grammar", "maths", "science", "history", "atlas",
        "dictionary", "institute",
    ),
    "travel": (
        "travel", "trip", "tour", "tours", "ticket", "fare", "rail", "train", "flight",
        "hotel", "hostel", "lodge", "inn", "voyage", "journey", "route", "timetable",
        "station", "ferry", "coach", "cruise", "holiday", "vacation", "booking", "map",
        "guide", "destination", "resort", "cabin", "camp", "passport", "visa", "itinerary",
        "getaway",
    ),
    "social": (
        "forum", "community", "chat", "friends", "circle", "club", "connect", "share",
        "post", "talk", "thread", "group", "social", "people", "profile", "meetup",
        "hangout", "network", "buddy", "follow", "feed", "board", "lounge", "crowd",
        "neighbours", "village", "commons", "gather", "message", "pals", "tribe", "voices",
    ),
    "games": (
        "games", "game", "play", "arcade", "quest", "puzzle", "level", "arena", "pixel",
        "gamer", "clan", "raid", "loot", "dungeon", "boss", "player", "console", "joystick",
        "tabletop", "chess", "dice", "trivia", "adventure", "guild", "speedrun", "mods",
        "esports", "tournament", "heroes", "saga", "retro",
    ),
    "streaming": (
        "stream", "watch", "video", "tube", "tv", "radio", "music", "tunes", "podcast",
        "episode", "channel", "movie", "film", "cinema", "show", "series", "playlist",
        "live", "broadcast", "listen", "audio", "clip", "vod", "studio", "track", "album",
        "beats", "reel", "screen", "replay",
    ),
    "dev-tools": (
        "code", "dev", "git", "api", "docs", "sdk", "build", "compile", "debug", "deploy",
        "repo", "package", "script", "stack", "byte", "kernel", "binary", "terminal",
        "shell", "server", "cloud", "devops", "source", "commit", "patch", "release",
        "download", "toolkit", "framework", "runtime", "module", "cli", "plugin", "snippet",
        "syntax", "compiler",
    ),
    "file-lockers": (
        "files", "file", "drop", "locker", "vault", "upload", "sharing", "transfer", "bulk",
        "storage", "box", "crate", "bin", "dump", "mirror", "archive", "zip", "stash",
        "safe", "send", "fileshare", "bucket", "anon", "torrent", "megabyte", "gigabyte",
        "uploads", "filedrop",
    ),
    "dating": (
        "date", "dating", "match", "singles", "romance", "love", "heart", "flirt", "cupid",
        "soulmate", "partner", "couples", "sweet", "spark", "crush", "meet", "companion",
        "personals", "admirer", "charm", "rendezvous", "valentine", "kindred", "together",
        "affection", "amour", "bond", "pair", "mingle",
    ),
    "betting": (
        "odds", "wager", "spin", "jackpot", "bet", "bets", "casino", "slots", "poker",
        "roulette", "lotto", "lottery", "stake", "bookie", "punter", "sportsbook", "payout",
        "bingo", "raffle", "chips", "blackjack", "reels", "luck", "lucky", "fortune", "tote",
        "handicap", "accumulator", "parlay", "betslip", "gamble",
    ),
    "adult": (
        "adult", "mature", "explicit", "erotic", "nude", "nsfw", "intimate", "sensual",
        "boudoir", "risque", "naughty", "lingerie", "cams", "velvet", "desire", "pleasure",
        "passion", "sultry", "steamy", "over18", "burlesque", "provocative", "racy",
        "xrated", "afterdark", "peep", "spicy", "tease", "uncensored", "sexy",
    ),
    "weapons": (
        "arms", "armory", "gun", "guns", "rifle", "pistol", "firearm", "ammo", "ammunition",
        "blade", "knife", "knives", "sword", "holster", "scope", "caliber", "cartridge",
        "tactical", "gunsmith", "bullet", "shotgun", "barrel", "trigger", "bayonet",
        "crossbow", "machete", "sidearm", "armorer", "munitions", "reloading",
    ),
    "scams": (
        "verify", "secure", "login", "prize", "winner", "claim", "reward", "free", "bonus",
        "refund", "unlock", "urgent", "alert", "confirm", "suspended", "recover", "airdrop",
        "giveaway", "support", "helpdesk", "congratulations", "limited", "instant",
        "doubler", "official", "security", "update", "reset", "validate", "winnings",
    ),
}

# Relative site frequency per category: uneven on purpose (common and rare categories).
CATEGORY_WEIGHTS: dict[str, float] = {
    "news": 11.0, "shopping": 11.0, "social": 10.0, "dev-tools": 10.0, "money": 7.0,
    "learning": 7.0, "travel": 6.0, "streaming": 6.0, "games": 6.0, "health": 5.0,
    "file-lockers": 3.5, "dating": 3.0, "betting": 3.5, "adult": 3.5, "weapons": 2.0,
    "scams": 2.5,
}

# Path templates per category. Placeholders are filled by ``_fill``.
_PATHS: dict[str, tuple[str, ...]] = {
    "news": (
        "/articles/{y}/{m}/{slug}", "/news/{w}/{slug}", "/{y}/{m}/{d}/{slug}",
        "/opinion/{slug}", "/live/{slug}-{n}", "/weather/{place}", "/section/{w}",
        "/story/{n}/{slug}", "/latest", "/archive/{y}/{m}",
    ),
    "shopping": (
        "/cart/item/{n}", "/product/{slug}-{n}", "/category/{w}/{w2}", "/checkout",
        "/deals/{w}", "/search?q={w}&sort=price", "/p/{n}?colour={colour}", "/listing/{n}",
        "/basket", "/offers/{slug}",
    ),
    "money": (
        "/accounts/overview", "/loans/{w}", "/insurance/{w}/quote", "/invest/{slug}",
        "/tax/{y}/{slug}", "/rates", "/cards/{w}", "/help/{slug}", "/login", "/pay/{id}",
    ),
    "health": (
        "/conditions/{slug}", "/symptoms/{w}", "/clinic/{place}/appointments",
        "/pharmacy/{w}-{n}", "/fitness/{slug}", "/articles/{slug}", "/find-a-doctor?area={n}",
        "/nutrition/{w}",
    ),
    "learning": (
        "/courses/{w}/{slug}", "/lesson/{n}", "/library/catalog/{n}", "/wiki/{wiki}",
        "/research/{y}/{slug}", "/exam/{w}/past-papers", "/faculty/{w}", "/students/{slug}",
    ),
    "travel": (
        "/timetable/{place}/{place2}", "/book/{slug}", "/hotels/{place}-{n}",
        "/routes/{place}-to-{place2}", "/tickets?from={place}&to={place2}&date={date}",
        "/guides/{slug}", "/map/{n}/{n2}", "/deals/{w}",
    ),
    "social": (
        "/t/{slug}/{n}", "/u/{user}", "/groups/{w}", "/forum/{w}/thread-{n}", "/posts/{n}",
        "/profile/{user}", "/messages", "/c/{w}/{slug}",
    ),
    "games": (
        "/play/{slug}", "/games/{w}/{n}", "/leaderboard/{w}", "/guides/{slug}",
        "/mods/{slug}-{n}", "/store/game/{n}", "/tournament/{y}/{w}", "/forum/{w}",
    ),
    "streaming": (
        "/watch?v={code}", "/episode/{n}", "/series/{slug}/season-{p}", "/podcast/{slug}",
        "/live/{w}", "/playlist/{code}", "/channel/{user}", "/music/{w}/{slug}",
    ),
    "dev-tools": (
        "/docs/{w}/{slug}", "/api/v{p}/{w}", "/releases/{v}", "/downloads/{w}-{v}.tar.gz",
        "/issues/{n}", "/repo/{user}/{w}", "/blob/main/src/{w}.py", "/guide/{slug}",
    ),
    "file-lockers": (
        "/f/{code}", "/file/{code}/{fname}", "/d/{code}", "/download/{code}",
        "/folder/{code}", "/get?id={code}",
    ),
    "dating": (
        "/profiles/{user}", "/matches/{n}", "/singles/{place}", "/chat/{code}", "/signup",
        "/search?age={age}-{age2}&near={place}", "/stories/{slug}",
    ),
    "betting": (
        "/casino/live/roulette", "/sports/{w}/{slug}", "/odds/{w}/{n}", "/slots/{slug}",
        "/promo/{w}-bonus", "/betslip?id={n}", "/lotto/results/{y}-{m}-{d}",
        "/poker/tables/{n}",
    ),
    "adult": (
        "/gallery/{n}", "/videos/{w}-{n}", "/members/{user}", "/cams/{user}",
        "/models/{user}", "/verify-age", "/category/{w}", "/clips/{code}",
    ),
    "weapons": (
        "/shop/{w}/{n}", "/rifles/{slug}", "/ammo/{w}-{n}", "/knives/{slug}-{n}",
        "/parts/{w}", "/range/bookings", "/reloading/{slug}", "/catalog?type={w}",
    ),
    "scams": (
        "/verify/account?session={id}", "/claim/{code}", "/prize/{slug}",
        "/login.php?ref={id}", "/update-billing", "/winner/{n}", "/support/ticket-{n}",
        "/wallet/connect?token={id}", "/download/invoice-{n}.zip",
    ),
}

_SUBDOMAINS: dict[str, tuple[str, ...]] = {
    "news": ("news", "live", "blog"), "shopping": ("shop", "store", "deals"),
    "money": ("secure", "online", "app"), "health": ("care", "clinic"),
    "learning": ("learn", "library", "courses"), "travel": ("book", "tickets"),
    "social": ("forum", "community", "chat"), "games": ("play",),
    "streaming": ("watch", "listen", "tv"), "dev-tools": ("docs", "api", "git", "downloads"),
    "file-lockers": ("dl", "cdn", "files"), "dating": ("meet",),
    "betting": ("bet", "casino", "live"), "adult": ("members",), "weapons": ("store",),
    "scams": ("secure", "login", "verify", "account"),
}

# A misleading URL borrows the words of a plausible decoy category.
_DECOYS: dict[str, tuple[str, ...]] = {
    "news": ("social", "learning"), "shopping": ("money", "travel"),
    "money": ("shopping", "news"), "health": ("shopping", "learning"),
    "learning": ("news", "dev-tools"), "travel": ("shopping", "news"),
    "social": ("news", "dating"), "games": ("learning", "streaming", "dev-tools"),
    "streaming": ("news", "games"), "dev-tools": ("learning", "games"),
    "file-lockers": ("dev-tools", "streaming"), "dating": ("social", "health"),
    "betting": ("games", "money", "news"), "adult": ("health", "dating", "streaming"),
    "weapons": ("shopping", "games", "travel"), "scams": ("money", "shopping", "dev-tools"),
}

# Per-category chance that a site is opaque / on shared hosting / misleading (rest: clear).
_SIGNAL_ODDS: dict[str, tuple[float, float, float]] = {
    "news": (0.28, 0.07, 0.03), "shopping": (0.35, 0.07, 0.03), "money": (0.30, 0.04, 0.03),
    "health": (0.28, 0.08, 0.03), "learning": (0.22, 0.10, 0.03),
    "travel": (0.30, 0.06, 0.03), "social": (0.30, 0.14, 0.03), "games": (0.35, 0.08, 0.03),
    "streaming": (0.35, 0.08, 0.03), "dev-tools": (0.30, 0.10, 0.03),
    "file-lockers": (0.25, 0.40, 0.04), "dating": (0.30, 0.10, 0.05),
    "betting": (0.30, 0.06, 0.08), "adult": (0.30, 0.12, 0.08),
    "weapons": (0.28, 0.06, 0.06), "scams": (0.20, 0.25, 0.30),
}

_MODIFIERS: tuple[str, ...] = (
    "harbor", "north", "river", "oak", "copper", "lantern", "tallow", "mere", "granite",
    "willow", "ember", "summit", "meadow", "bright", "blue", "red", "green", "old", "new",
    "first", "true", "grand", "little", "city", "valley", "coast", "cedar", "maple",
    "stone", "silver", "golden", "iron", "east", "west", "south", "open", "prime",
)
_SUFFIXES: tuple[str, ...] = (
    "hub", "online", "now", "hq", "zone", "world", "central", "direct", "plus", "24",
    "365", "point", "base", "spot",
)
# Unicode host words so the IDNA path is exercised (ordinary words, no names).
_IDN_WORDS: tuple[str, ...] = (
    "café", "crème", "jardín", "fjärd", "mañana", "åsen", "über", "señal", "brûlé",
    "château", "straße", "ñandú", "øre", "ειδήσεις", "новости",
)
_PLACES: tuple[str, ...] = (
    "tallowmere", "brackenholt", "morrowgate", "quillby", "fenmarsh", "vantry",
    "osterlake", "dunmirren", "kestrelby", "harrowmere", "lindqvale", "copperfold",
    "wrenhaven", "saltreach", "emberley", "greyweir",
)
_COLOURS: tuple[str, ...] = ("red", "blue", "green", "black", "white", "grey", "amber")
_TLDS: tuple[tuple[str, float], ...] = (
    (".example", 0.52), (".test", 0.30), (".example.com", 0.06), (".example.net", 0.05),
    (".example.org", 0.05), (".invalid", 0.02),
)
_NEUTRAL_PATHS: tuple[str, ...] = (
    "/about", "/contact", "/index.html", "/p/{n}", "/{code}", "/c/{n}/{code}", "/en/{syl}",
    "/{syl}", "/{syl}/{syl2}-{n}", "/view?id={n}", "/s/{code}", "/home", "/page/{p}",
    "/{syl}.html", "/en/{syl}/{n}", "/x/{id}",
)
_GENERIC_QUERIES: tuple[str, ...] = (
    "?id={n}", "?ref=mail", "?ref=home", "?lang=en", "?p={p}", "?id={n}&ref=mail",
    "?utm_source=newsletter&utm_medium=email", "?src=app", "?s={code}",
)

# Shared hosts: (host, kind). ``{user}`` in a host gives each user a subdomain.
SHARED_HOSTS: tuple[tuple[str, str], ...] = (
    ("pages.hostbarn.example", "pages"),
    ("home.nestpage.test", "pages"),
    ("{user}.sitecove.example", "user-subdomain"),
    ("drop.crateloft.test", "storage"),
    ("files.boxwharf.example", "storage"),
    ("bucketyard.example.net", "storage"),
    ("lnk.test", "shortener"),
    ("go.shortrail.example", "shortener"),
)
_HOSTING_KIND_WEIGHT: dict[str, dict[str, float]] = {
    # how likely each kind of shared host is to carry a site of this category
    "file-lockers": {"storage": 6.0, "shortener": 1.5, "pages": 0.2, "user-subdomain": 0.2},
    "dev-tools": {"storage": 2.0, "shortener": 1.0, "pages": 1.5, "user-subdomain": 1.5},
    "streaming": {"storage": 1.5, "shortener": 1.0, "pages": 1.0, "user-subdomain": 0.5},
    "scams": {"storage": 1.5, "shortener": 2.0, "pages": 1.0, "user-subdomain": 1.5},
    "adult": {"storage": 1.5, "shortener": 1.0, "pages": 1.0, "user-subdomain": 1.0},
}
_DEFAULT_KIND_WEIGHT = {"storage": 0.4, "shortener": 1.0, "pages": 2.0, "user-subdomain": 1.5}

_SYL_ONSETS = (
    "b", "d", "f", "g", "k", "l", "m", "n", "p", "qu", "r", "s", "t", "v", "z", "br", "dr",
    "gr", "kl", "pl", "st", "tr", "sh", "th", "j",
)
#: The invented phonology's own word starts. Measured on the open-directory hosts and the
#: domain categories in ``shared/data`` (46,511 real host names): each of these pairs starts
#: a host label in at most 6 of them (tests/test_scenario.py checks it).
SIGNATURE_ONSETS = ("zv", "vl", "zr", "vz", "zd")
_SYL_VOWELS = ("a", "e", "i", "o", "u", "a", "e", "o", "ai", "ou", "ea", "io")
_SYL_CODAS = ("", "", "", "", "n", "r", "l", "m", "x", "k", "s", "nd")
_NAME_ENDINGS = ("", "", "", "", "o", "a", "ly", "io", "ex", "ix", "ra", "mo", "ik", "on")
_BASE62 = "0123456789abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"

# Every category word of 3+ letters: an "opaque" name must contain none of them.
_ALL_WORDS: tuple[str, ...] = tuple(
    sorted({w for ws in CATEGORY_WORDS.values() for w in ws if len(w) >= 3}, key=len)
)
_WORD_PATTERN = re.compile("|".join(re.escape(w) for w in _ALL_WORDS))
_PLACEHOLDER = re.compile(r"\{(\w+)\}")

# Zipf-like popularity: exponent of the site rank, and within-site skew over URLs.
_ZIPF_EXPONENT = 1.1
_WITHIN_SITE_EXPONENT = 1.3


# --------------------------------------------------------------------------------------
# Building blocks
# --------------------------------------------------------------------------------------

def _syllable(r: random.Random) -> str:
    return r.choice(_SYL_ONSETS) + r.choice(_SYL_VOWELS) + r.choice(_SYL_CODAS)


def _invented_word(r: random.Random, syllables: tuple[int, int] = (2, 3)) -> str:
    """A pronounceable invented word that contains no category word (so it says nothing).

    It starts with one of the scenario's own onsets (``SIGNATURE_ONSETS``: letter pairs that
    almost never start a label of a real host name; it takes the place of the first
    letter), so an invented name cannot land on a real, well-known site by chance: by
    construction, with no list of real names."""
    while True:
        n = r.randint(*syllables)
        word = "".join(_syllable(r) for _ in range(n))
        word += r.choice(_NAME_ENDINGS)
        word = r.choice(SIGNATURE_ONSETS) + word[1:] if word[0] not in "aeiou" else \
            r.choice(SIGNATURE_ONSETS) + word
        if 4 <= len(word) <= 10 and not _WORD_PATTERN.search(word):
            return word


def _code(r: random.Random, lo: int = 5, hi: int = 7) -> str:
    return "".join(r.choice(_BASE62) for _ in range(r.randint(lo, hi)))


def _user(r: random.Random) -> str:
    roll = r.random()
    if roll < 0.4:
        return f"user{r.randint(10, 99999)}"
    if roll < 0.8:
        return f"{_invented_word(r, (1, 2))}{r.randint(1, 999)}"
    return f"{_invented_word(r, (1, 2))}-{_invented_word(r, (1, 2))}"


def _tld(r: random.Random) -> str:
    return r.choices([t for t, _ in _TLDS], weights=[w for _, w in _TLDS])[0]


def _two(r: random.Random, words: Sequence[str]) -> tuple[str, str]:
    a, b = r.sample(words, 2)
    return a, b


def _fill(template: str, r: random.Random, words: Sequence[str]) -> str:
    """Fill ``{placeholder}``s in a path template with invented values."""

    def slug(k: int | None = None) -> list[str]:
        return r.sample(words, k or r.randint(2, 4))

    def value(match: re.Match[str]) -> str:
        key = match.group(1)
        table: dict[str, Callable[[], str]] = {
            "w": lambda: r.choice(words),
            "w2": lambda: r.choice(words),
            "slug": lambda: "-".join(slug()),
            "wiki": lambda: "_".join(s.capitalize() for s in slug(r.randint(1, 3))),
            "n": lambda: str(r.randint(10, 10 ** r.randint(3, 6))),
            "n2": lambda: str(r.randint(1, 999)),
            "p": lambda: str(r.randint(1, 9)),
            "y": lambda: str(r.choice((2024, 2025, 2026, 2026))),
            "m": lambda: f"{r.randint(1, 12):02d}",
            "d": lambda: f"{r.randint(1, 28):02d}",
            "date": lambda: f"2026-{r.randint(9, 12):02d}-{r.randint(1, 28):02d}",
            "id": lambda: _code(r, 8, 14),
            "code": lambda: _code(r),
            "user": lambda: _user(r),
            "place": lambda: r.choice(_PLACES),
            "place2": lambda: r.choice(_PLACES),
            "colour": lambda: r.choice(_COLOURS),
            "v": lambda: f"{r.randint(0, 4)}.{r.randint(0, 20)}.{r.randint(0, 9)}",
            "age": lambda: str(r.randint(18, 40)),
            "age2": lambda: str(r.randint(41, 70)),
            "syl": lambda: _invented_word(r, (1, 3)),
            "syl2": lambda: _invented_word(r, (1, 3)),
            "fname": lambda: _file_name(r, words, hint=0.5),
        }
        return table[key]()

    return _PLACEHOLDER.sub(value, template)


def _file_name(r: random.Random, words: Sequence[str], hint: float) -> str:
    """A stored file's name; with probability ``hint`` it carries a category word."""
    if words and r.random() < hint:
        stem = "-".join(r.sample(words, r.randint(1, 2)))
        ext = r.choice(("zip", "pdf", "mp4", "tar.gz", "exe", "jpg"))
        return f"{stem}-{r.randint(1, 999)}.{ext}"
    return r.choice((
        f"IMG_{r.randint(1000, 9999)}.jpg", f"doc-{r.randint(1, 9999)}.pdf",
        f"{_invented_word(r, (1, 2))}_{r.randint(1, 99)}.zip", f"setup-{_code(r, 4, 6)}.exe",
        f"scan{r.randint(1, 999)}.pdf", f"{_code(r, 6, 8)}.bin",
    ))


def _word_host_label(r: random.Random, words: Sequence[str], idn: bool) -> str:
    """A host label composed from category words, e.g. ``dailyledger-bulletin``."""
    w1, w2 = _two(r, words)
    mod = r.choice(_IDN_WORDS) if idn else r.choice(_MODIFIERS)
    roll = r.random()
    if idn:
        return f"{mod}-{w1}" if roll < 0.7 else f"{w1}-{mod}"
    if roll < 0.28:
        return mod + w1
    if roll < 0.48:
        return w1 + w2
    if roll < 0.63:
        return f"{w1}-{w2}"
    if roll < 0.73:
        return f"{mod}{w1}-{w2}"
    if roll < 0.88:
        return w1 + r.choice(_SUFFIXES)
    return f"{mod}-{w1}"


def _subdomain(r: random.Random, category: str | None) -> str:
    roll = r.random()
    if roll < 0.35:
        return ""
    if roll < 0.70:
        return "www."
    if roll < 0.78:
        return "m."
    if category is None or roll < 0.85:
        return r.choice(("app.", "web.", "en.", "portal."))
    return r.choice(_SUBDOMAINS[category]) + "."


@dataclass(slots=True)
class _Site:
    category: str
    signal: str
    host: str           # the host of every URL of this site (for a user subdomain, its own)
    scheme: str
    words: tuple[str, ...]   # words the URL paths draw from (decoy words when misleading)
    paths: tuple[str, ...]
    hosting_kind: str = ""
    user: str = ""


def _make_site(
    r: random.Random, category: str, signal: str, taken_hosts: set[str],
    users_on: dict[str, set[str]],
) -> _Site:
    """Invent one site: its host, scheme and the vocabulary its paths draw from."""
    scheme = "https" if r.random() < (0.65 if category == "scams" else 0.82) else "http"
    if signal == "hosting":
        weights = _HOSTING_KIND_WEIGHT.get(category, _DEFAULT_KIND_WEIGHT)
        host_pattern, kind = r.choices(
            SHARED_HOSTS, weights=[weights[k] for _, k in SHARED_HOSTS]
        )[0]
        users = users_on.setdefault(host_pattern, set())
        user = _user(r)
        while user in users:
            user = _user(r)
        users.add(user)
        host = host_pattern.replace("{user}", user)
        return _Site(category, signal, host, "https", CATEGORY_WORDS[category], (),
                     hosting_kind=kind, user=user)
    while True:
        if signal == "opaque":
            label = _invented_word(r)
            if r.random() < 0.15:
                label += "-" + _invented_word(r, (1, 2))
            host = _subdomain(r, None) + label + _tld(r)
            words: tuple[str, ...] = ()
            paths = _NEUTRAL_PATHS
        else:
            source = r.choice(_DECOYS[category]) if signal == "misleading" else category
            words = CATEGORY_WORDS[source]
            idn = r.random() < 0.025
            host = _subdomain(r, source) + _word_host_label(r, words, idn) + _tld(r)
            paths = _PATHS[source]
        if host not in taken_hosts:
            taken_hosts.add(host)
            return _Site(category, signal, host, scheme, words, paths)


def _site_path(r: random.Random, site: _Site, first: bool) -> str:
    """One path (with any query) on ``site``."""
    if site.signal == "hosting":
        return _hosting_path(r, site, first)
    if first and r.random() < 0.6:
        return "/"
    template = r.choice(site.paths)
    if site.signal != "opaque" and r.random() < 0.15:
        template = r.choice(_NEUTRAL_PATHS)
    path = _fill(template, r, site.words or ("x",))
    if "?" not in path and r.random() < 0.18:
        path += _fill(r.choice(_GENERIC_QUERIES), r, ("x",))
    return path


def _hosting_path(r: random.Random, site: _Site, first: bool) -> str:
    words = site.words
    kind, user = site.hosting_kind, site.user
    if kind == "shortener":
        return "/" + _code(r)
    if kind == "storage":
        code = _code(r, 5, 9)
        if site.host.startswith("drop."):
            return f"/f/{code}" if r.random() < 0.6 else f"/f/{code}/{_file_name(r, words, 0.3)}"
        if site.host.startswith("files."):
            return f"/d/{code}/{_file_name(r, words, 0.3)}"
        return f"/b/{user}/{code}/{_file_name(r, words, 0.3)}"
    page = (
        "-".join(r.sample(words, r.randint(1, 3))) if r.random() < 0.35
        else r.choice(("index", "about", "links", "photos", "notes", f"page{r.randint(1, 40)}",
                       _invented_word(r, (1, 2))))
    )
    ext = r.choice((".html", "", "/"))
    if kind == "pages":
        prefix = f"/~{user}" if site.host.startswith("pages.") else f"/{user}"
        return f"{prefix}/" if first else f"{prefix}/{page}{ext}"
    return "/" if first else f"/{page}{ext}"   # user subdomain


def _dressed_host(r: random.Random, host: str, scheme: str) -> str:
    """The host as typed in the log: now and then upper-cased or with an explicit port."""
    roll = r.random()
    if roll < 0.006 and host.isascii():
        host = host.upper()
    elif roll < 0.012:
        host += ":443" if scheme == "https" else ":80"
    return host


def _page_seed(seed: int, url: str) -> int:
    """A stable per-URL integer for the page generator (independent of generation order)."""
    digest = hashlib.blake2b(f"{seed}\x00{url}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "big") >> 1


# --------------------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------------------

def generate_telemetry(
    seed: int = 0,
    n_sites: int = 2000,
    urls_per_site: tuple[int, int] = (1, 12),
    start: str = "2026-09-01",
    weeks: int = 6,
) -> list[TelemetryRecord]:
    """Invent the scenario's lookup log: one record per distinct URL, ordered by first sighting.

    Deterministic from ``seed``. Site popularity follows a Zipf-like law, so a few URLs get
    thousands of lookups and most get one to three; popular sites tend to appear early.
    """
    if n_sites < 1:
        raise ValueError(f"n_sites must be at least 1, not {n_sites}")
    lo, hi = urls_per_site
    if not 1 <= lo <= hi:
        raise ValueError(f"urls_per_site must be (lo, hi) with 1 <= lo <= hi, not {urls_per_site}")
    if weeks < 1:
        raise ValueError(f"weeks must be at least 1, not {weeks}")
    try:
        t0 = datetime.fromisoformat(start)
    except ValueError:
        raise ValueError(
            f"start must be an ISO 8601 date such as 2026-09-01, not {start!r}"
        ) from None
    t0 = t0.replace(tzinfo=UTC) if t0.tzinfo is None else t0.astimezone(UTC)
    window_s = weeks * 7 * 86400

    names = demo_taxonomy().names
    missing = set(names) ^ set(CATEGORY_WORDS)
    if missing:  # the vocabulary and the shipped taxonomy must describe the same categories
        raise RuntimeError(f"scenario vocabulary and demo taxonomy differ on {sorted(missing)}")

    r = random.Random(seed)
    rng = np.random.default_rng(seed)

    categories = r.choices(names, weights=[CATEGORY_WEIGHTS[c] for c in names], k=n_sites)
    ranks = rng.permutation(n_sites) + 1                       # 1 = most popular
    scale = 4.0 * n_sites ** _ZIPF_EXPONENT                    # least popular site: ~4 lookups
    noise = rng.lognormal(0.0, 0.35, size=n_sites)
    site_totals = np.maximum(1, np.rint(scale * ranks ** -_ZIPF_EXPONENT * noise)).astype(int)

    taken_hosts: set[str] = set()
    users_on: dict[str, set[str]] = {}
    seen_keys: set[str] = set()
    rows: list[tuple[int, str, str, int, str, str]] = []       # (t, url, label, count, site, sig)

    for i, category in enumerate(categories):
        p_opaque, p_hosting, p_misleading = _SIGNAL_ODDS[category]
        roll = r.random()
        signal = (
            "opaque" if roll < p_opaque
            else "hosting" if roll < p_opaque + p_hosting
            else "misleading" if roll < p_opaque + p_hosting + p_misleading
            else "clear"
        )
        site = _make_site(r, category, signal, taken_hosts, users_on)
        percentile = (ranks[i] - 1) / n_sites                  # 0 = top site
        shape = 0.7 if percentile < 0.05 else 1.7              # popular sites: more URLs
        k = min(hi, lo + int((hi - lo + 1) * r.random() ** shape))

        paths: list[str] = []
        attempts = 0
        while len(paths) < k and attempts < 8 * k:
            attempts += 1
            path = _site_path(r, site, first=not paths)
            key = f"{site.scheme}://{site.host}{path}"
            if key in seen_keys:
                continue
            seen_keys.add(key)
            paths.append(path)
        k = len(paths)

        total = max(int(site_totals[i]), k)
        weights = (np.arange(1, k + 1) ** -_WITHIN_SITE_EXPONENT) * rng.lognormal(0, 0.3, k)
        counts = 1 + rng.multinomial(total - k, weights / weights.sum())

        # Popular sites are seen early; a site's other URLs trickle in after its first one.
        site_frac = r.random() ** (1.0 / (0.3 + 1.7 * percentile))
        site_t = int(site_frac * window_s)
        for j, (path, count) in enumerate(zip(paths, counts, strict=True)):
            t = site_t if j == 0 else site_t + int((window_s - 1 - site_t) * r.random() ** 1.5)
            url = f"{site.scheme}://{_dressed_host(r, site.host, site.scheme)}{path}"
            rows.append((t, url, category, int(count), site.host, signal))

    rows.sort(key=lambda row: (row[0], row[1]))
    return [
        TelemetryRecord(
            url=url,
            label=label,
            count=count,
            seen_at=(t0 + timedelta(seconds=t)).strftime("%Y-%m-%dT%H:%M:%SZ"),
            site=host,
            signal=signal,
            page_seed=_page_seed(seed, url),
        )
        for t, url, label, count, host, signal in rows
    ]


def _open_text(path: Path, mode: str) -> IO[str]:
    """Open a text file for the csv module, through gzip when the name ends in ``.gz``."""
    if path.suffix == ".gz":
        return gzip.open(path, mode + "t", encoding="utf-8", newline="")
    return open(path, mode, encoding="utf-8", newline="")


def write_telemetry_csv(records: Iterable[TelemetryRecord], path: str | Path) -> int:
    """Write records as CSV (gzip-compressed when the name ends in ``.gz``); return the count."""
    path = Path(path)
    n = 0
    with _open_text(path, "w") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(TELEMETRY_FIELDS)
        for rec in records:
            writer.writerow((rec.url, rec.label, rec.count, rec.seen_at, rec.site, rec.signal,
                             rec.page_seed))
            n += 1
    return n


def read_telemetry_csv(path: str | Path) -> list[TelemetryRecord]:
    """Read a CSV written by ``write_telemetry_csv`` (``.gz`` accepted)."""
    path = Path(path)
    with _open_text(path, "r") as fh:
        reader = csv.reader(fh)
        header = next(reader, None)
        if header is None or tuple(header) != TELEMETRY_FIELDS:
            raise InputFormatError(
                f"{str(path)!r} is not a telemetry CSV: expected header "
                f"{','.join(TELEMETRY_FIELDS)}, found {','.join(header or [])!r}"
            )
        records = []
        for line_no, row in enumerate(reader, start=2):
            try:
                url, label, count, seen_at, site, signal, page_seed = row
                records.append(TelemetryRecord(url, label, int(count), seen_at, site, signal,
                                               int(page_seed)))
            except ValueError as exc:
                raise InputFormatError(f"{str(path)!r} line {line_no}: {exc}") from None
    return records
