"""pytest fixtures for the mtgauge differential tests.

The binary is located through MTGAUGE_BIN, or <repo>/target/debug/mtgauge by
default. Nothing is ever skipped: if the binary is missing, every test that
runs it FAILS with a message saying where it was looked for.
"""

import sys
import unicodedata
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from mtg_helpers import Mtgauge, binary_path  # noqa: E402


def pytest_report_header(config):
    return [
        f"mtgauge binary: {binary_path()}",
        # The perluniprops stub below is built from Python's unicodedata tables.
        f"python unicodedata version: {unicodedata.unidata_version}",
    ]


@pytest.fixture(scope="session")
def mtgauge_bin() -> Path:
    """Path of the binary under test (existence is checked by each run, which fails)."""
    return binary_path()


@pytest.fixture(scope="session")
def mtgauge(mtgauge_bin) -> Mtgauge:
    return Mtgauge(mtgauge_bin)


class UnicodedataPerluniprops:
    """Stand-in for NLTK's 'perluniprops' corpus, which cannot be downloaded here.

    This stub REPLACES NLTK's perluniprops data with Python's unicodedata tables
    (version printed in the pytest header and in NIST_UNICODE_VERSION):
      "Number"      -> general categories N*  (Perl \\p{N})
      "Punctuation" -> general categories P*  (Perl \\p{P})
      "Symbol"      -> general categories S*  (Perl \\p{S})
    over all code points 0..0x10FFFF except surrogates.
    """

    PREFIX = {"Number": "N", "Punctuation": "P", "Symbol": "S"}

    def __init__(self):
        self._cache = {}

    def chars(self, category=None, fileids=None):
        prefix = self.PREFIX[category]
        if prefix not in self._cache:
            self._cache[prefix] = [
                chr(cp)
                for cp in range(0x110000)
                if not (0xD800 <= cp <= 0xDFFF) and unicodedata.category(chr(cp)).startswith(prefix)
            ]
        return list(self._cache[prefix])


NIST_UNICODE_VERSION = unicodedata.unidata_version


def install_perluniprops_stub():
    # nltk/tokenize/nist.py does `from nltk.corpus import perluniprops` at import
    # time and reads the character lists in its class body, so the attribute must
    # be replaced on the nltk.corpus module object BEFORE importing it.
    import nltk.corpus

    if "nltk.tokenize.nist" in sys.modules:
        mod = sys.modules["nltk.tokenize.nist"]
        assert isinstance(mod.perluniprops, UnicodedataPerluniprops), (
            "nltk.tokenize.nist was imported before the perluniprops stub was installed"
        )
        return mod
    nltk.corpus.perluniprops = UnicodedataPerluniprops()
    import nltk.tokenize.nist as mod

    assert isinstance(mod.perluniprops, UnicodedataPerluniprops)
    return mod


@pytest.fixture(scope="session")
def nist_tokenizer():
    import warnings

    with warnings.catch_warnings():
        # Large generated character classes may trigger FutureWarnings in regex.
        warnings.simplefilter("ignore")
        mod = install_perluniprops_stub()
    tok = mod.NISTTokenizer()
    # Sanity check against NLTK 3.10.4's own NISTTokenizer doctest
    # (nltk/tokenize/nist.py): "Good muffins cost $3.88 in New York."
    assert tok.tokenize("Good muffins cost $3.88 in New York.") == [
        "Good", "muffins", "cost", "$", "3.88", "in", "New", "York", ".",
    ]
    return tok
