"""Differential test of `mtgauge tokenize` against NLTK 3.10.4's NISTTokenizer.

  --tokenize nist          == NISTTokenizer().tokenize(text, lowercase=L)
  --tokenize nist-unicode  == NISTTokenizer().international_tokenize(text, lowercase=L)

NLTK's 'perluniprops' data cannot be downloaded here; conftest.py replaces it
with a stub built from Python's unicodedata (N*/P*/S* general categories), so
the reference is "NLTK 3.10.4 NISTTokenizer with Unicode <unidata_version>
character classes" (the version is printed in the pytest header).

Inputs are random strings from a seeded RNG. Code points used: assigned in
Python's unicodedata (category != 'Cn'), no surrogates, and none of
'\n' '\r' U+000B U+000C U+001C U+001D U+001E U+0085 U+2029: those are line
boundaries for Python's str.splitlines() and would confuse line-oriented I/O.
U+2028 is also one of them but is deliberately kept (NLTK's STRIP_EOL_HYPHEN
rule maps it to a space); the output is therefore split on '\n' only.
U+FEFF is left out so that no line starts with a byte-order mark.
"""

import random
import string
import unicodedata

import pytest

EXCLUDED = {0x0A, 0x0D, 0x0B, 0x0C, 0x1C, 0x1D, 0x1E, 0x85, 0x2029, 0xFEFF}


def allowed(ch):
    cp = ord(ch)
    return (cp not in EXCLUDED and not (0xD800 <= cp <= 0xDFFF)
            and unicodedata.category(ch) != "Cn")


def _category_pool(prefix, step):
    pool = []
    for cp in range(0, 0x110000, 1):
        if 0xD800 <= cp <= 0xDFFF:
            continue
        ch = chr(cp)
        if unicodedata.category(ch).startswith(prefix) and allowed(ch):
            pool.append(ch)
    return pool[::step]


ENTITIES = ["&amp;", "&lt;", "&gt;", "&quot;", "&apos;", "&#124;", "&#91;", "&#93;",
            # near-misses and stacked escapes
            "&amp;lt;", "&amp;amp;", "&lt;skipped&gt;", "&", "&#12", "&lt", "&AMP;", "&LT;",
            "&Quot;", ";", "&#124", "&#x7c;"]
SKIPS = ["<skipped>", "<skipped>", "<skip", "ped>", "<SKIPPED>", "<skipped"]
LATIN1_LETTERS = [chr(c) for c in range(0xC0, 0x100) if chr(c).isalpha()]
OTHER_LETTERS = list("ĀăĞğİıŁłŒœŠšŽžſƒǅẞΆΑΣσςΩωДжЯяЁёԱաאבعربهनमस्तेกขᏣᏤ") + [
    "\u212A",  # KELVIN SIGN: lowercases to ASCII 'k'
    "\u212B",  # ANGSTROM SIGN
    "\U0001D400",  # MATHEMATICAL BOLD CAPITAL A (astral, Lu)
    "e\u0301",  # combining acute (Mn)
]
UNI_PUNCT_SYM_NUM = list("«»„“”‘’‚–—…€£¥½²³¹٣٤٫٬‰†‡•¡¿·§¶©®°±×÷¤¢¬¦¯´¸¨₹₽₿℃№™Ω℮⅓Ⅻ①⑳０１９！？，。、「」『』【】〜・") + [
    "\u2604", "\U0001F600", "\U0001F44D", "\U00010107", "\U0001D7CE",
]
CJK = [chr(c) for c in range(0x4E00, 0x9FFF, 37)] + list("ひらがなカタカナ한국어")
UNI_SPACES = ["\u00a0", "\u3000", "\u2002", "\u2003", "\u2009", "\u200a", "\u202f",
              "\u205f", "\u1680", "\u2007"]
ZERO_WIDTH = ["\u200b", "\u200c", "\u200d", "\u2060"]  # Cf: not whitespace anywhere
CONTROLS = ["\x00", "\x01", "\x07", "\x1b", "\x7f", "\x80", "\x9f"]
ASCII_PUNCT = list(string.punctuation)


def make_strings(seed, count):
    rng = random.Random(seed)
    P_ALL = _category_pool("P", 7)
    S_ALL = _category_pool("S", 29)
    N_ALL = _category_pool("N", 11)
    pieces = [
        (30, lambda: "".join(rng.choice(string.ascii_letters) for _ in range(rng.randint(1, 8)))),
        (10, lambda: "".join(rng.choice(string.digits) for _ in range(rng.randint(1, 4)))),
        (5, lambda: rng.choice(["3.14", "1,000", "2-3", "7.", ",5", "-4", "10.5.6", "a.b", "x,y", "1-"])),
        (18, lambda: rng.choice(ASCII_PUNCT)),
        (20, lambda: rng.choice([" ", " ", " ", "  ", "\t", " \t"])),
        (6, lambda: rng.choice(ENTITIES)),
        (2, lambda: rng.choice(SKIPS)),
        (2, lambda: "\u2028"),
        (6, lambda: rng.choice(LATIN1_LETTERS)),
        (5, lambda: rng.choice(OTHER_LETTERS)),
        (6, lambda: rng.choice(UNI_PUNCT_SYM_NUM)),
        (2, lambda: rng.choice(P_ALL)),
        (2, lambda: rng.choice(S_ALL)),
        (2, lambda: rng.choice(N_ALL)),
        (4, lambda: "".join(rng.choice(CJK) for _ in range(rng.randint(1, 3)))),
        (3, lambda: rng.choice(UNI_SPACES)),
        (1, lambda: rng.choice(ZERO_WIDTH)),
        (1, lambda: rng.choice(CONTROLS)),
    ]
    weights = [w for w, _ in pieces]
    makers = [m for _, m in pieces]
    out = []
    for i in range(count):
        n = rng.choice([0, 1, 2, 3]) if i % 50 == 0 else rng.randint(1, 40)
        s = "".join(rng.choices(makers, weights=weights, k=1)[0]() for _ in range(n))
        assert all(allowed(ch) for ch in s), repr(s)
        out.append(s)
    return out


@pytest.fixture(scope="module")
def strings():
    return make_strings(seed=20251202, count=3000)


def _diff(inputs, got, want):
    bad = [(s, g, w) for s, g, w in zip(inputs, got, want) if g != w]
    msg = []
    for s, g, w in bad[:6]:
        msg.append(f"  input: {s!r}\n    mtgauge: {g.split(' ')!r}\n    nltk:    {w.split(' ')!r}")
    return bad, "\n".join(msg)


CASES = [
    ("nist", False), ("nist", True), ("nist-unicode", False), ("nist-unicode", True),
]


@pytest.mark.parametrize("name,lower", CASES, ids=[f"{n}{'-lower' if l else ''}" for n, l in CASES])
def test_tokenize_matches_nltk_nist(mtgauge, nist_tokenizer, strings, name, lower):
    if name == "nist":
        # NLTK 3.10.4 NISTTokenizer.tokenize (unicodedata perluniprops stub)
        want = [" ".join(nist_tokenizer.tokenize(s, lowercase=lower)) for s in strings]
    else:
        # NLTK 3.10.4 NISTTokenizer.international_tokenize (unicodedata stub)
        want = [" ".join(nist_tokenizer.international_tokenize(s, lowercase=lower)) for s in strings]
    got = mtgauge.tokenize(name, strings, lowercase=lower)
    bad, msg = _diff(strings, got, want)
    assert not bad, (f"{len(bad)}/{len(strings)} inputs tokenized differently from NLTK "
                     f"(Unicode {unicodedata.unidata_version} stub); first ones:\n{msg}")


EDGE = [
    # Python's str.split() (used by NLTK after its regexes) also splits on the
    # information separator U+001F, which is not Unicode White_Space.
    "a\x1fb", "x \x1f y", "3\x1f.",
    # other Unicode spaces
    "a\u2000b\u2001c\u2004d\u2005e\u2006f\u2008g", "\u3000lead and trail\u00a0",
    # entity order: &lt;/&gt; then the extra entities, &amp; last (xml.sax.saxutils.unescape)
    "&amp;lt; &amp;quot; &lt;skipped&gt; &amp;#124;",
    "<skip<skipped>ped> ok",
    "1.000,5 a.b,c 4-5 -6 x-7",
    "«3» ½. 2€ ٣٫٤ ①.",
    "\u2028\u2028&#91;&#93;",
]


@pytest.mark.parametrize("name,lower", CASES, ids=[f"{n}{'-lower' if l else ''}" for n, l in CASES])
def test_tokenize_edge_cases(mtgauge, nist_tokenizer, name, lower):
    fn = nist_tokenizer.tokenize if name == "nist" else nist_tokenizer.international_tokenize
    want = [" ".join(fn(s, lowercase=lower)) for s in EDGE]  # NLTK 3.10.4 (unicodedata stub)
    got = mtgauge.tokenize(name, EDGE, lowercase=lower)
    bad, msg = _diff(EDGE, got, want)
    assert not bad, f"{len(bad)}/{len(EDGE)} edge inputs differ from NLTK:\n{msg}"

