"""Shared helpers for the mtgauge differential tests.

Everything here is invented for these tests: the vocabulary is generated from a
seeded RNG out of made-up syllables, so no text from any corpus is used.
"""

import json
import os
import random
import subprocess
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
DEFAULT_BIN = REPO / "target" / "debug" / "mtgauge"


def binary_path() -> Path:
    env = os.environ.get("MTGAUGE_BIN")
    if env:
        return Path(env).expanduser().resolve()
    return DEFAULT_BIN


def require_binary() -> Path:
    """Return the binary's path, or FAIL the current test (never skip)."""
    path = binary_path()
    if not path.is_file() or not os.access(path, os.X_OK):
        pytest.fail(
            f"mtgauge binary not found or not executable at {path} "
            "(set MTGAUGE_BIN, or run `cargo build` in the repository root); "
            "these tests fail rather than skip when the binary is missing",
            pytrace=False,
        )
    return path


def require_tool(name: str, env_var: str, why: str) -> Path:
    """Path of an outside program (from env_var or PATH), or FAIL the current test (never skip)."""
    import shutil

    env = os.environ.get(env_var)
    found = env or shutil.which(name)
    if not found or not os.access(found, os.X_OK):
        pytest.fail(f"{name} not found ({env_var}={env!r}, PATH lookup failed); {why} "
                    "fail rather than skip without it (Debian: apt-get install prometheus)",
                    pytrace=False)
    return Path(found)


class Mtgauge:
    """Runs the binary; every call first checks that it exists."""

    def __init__(self, path: Path):
        self.path = path

    def run(self, args, input_bytes=None, timeout=120):
        require_binary()
        return subprocess.run(
            [str(self.path), *[str(a) for a in args]],
            input=input_bytes,
            capture_output=True,
            timeout=timeout,
        )

    def run_ok(self, args, input_bytes=None):
        proc = self.run(args, input_bytes)
        assert proc.returncode == 0, (
            f"mtgauge {' '.join(map(str, args))} exited {proc.returncode}\n"
            f"stderr: {proc.stderr.decode('utf-8', 'replace')[:2000]}"
        )
        return proc

    def score_json(self, args, input_bytes=None):
        proc = self.run_ok(["score", *args, "--json"], input_bytes)
        text = proc.stdout.decode("utf-8")
        try:
            return json.loads(text)
        except json.JSONDecodeError as exc:  # pragma: no cover - diagnostic
            raise AssertionError(f"stdout is not one JSON object: {exc}: {text[:500]!r}")

    def tokenize(self, name, lines, lowercase=False):
        """Feed '\n'-terminated lines on stdin; return output split on '\n' only.

        `lowercase=True` runs `mtgauge tokenize --caseless` (the keyword keeps its old name for
        the callers in test_tokenize_nltk.py)."""
        for line in lines:
            assert "\n" not in line and "\r" not in line
        data = "".join(line + "\n" for line in lines).encode("utf-8")
        args = ["tokenize", "--tokenizer", name] + (["--caseless"] if lowercase else [])
        proc = self.run_ok(args, data)
        out = proc.stdout.decode("utf-8")
        # Split on '\n' only: str.splitlines() would also split on U+2028 etc.
        parts = out.split("\n")
        assert parts[-1] == "", f"output does not end with '\\n': {out[-80:]!r}"
        parts = parts[:-1]
        assert len(parts) == len(lines), f"{len(lines)} lines in, {len(parts)} lines out"
        return parts


# ---------------------------------------------------------------------------
# files


def write_lines(path: Path, lines):
    for line in lines:
        assert "\n" not in line and "\r" not in line, repr(line)
    path.write_bytes("".join(line + "\n" for line in lines).encode("utf-8"))
    return path


def write_refs_jsonl(path: Path, refs_per_seg):
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        for i, refs in enumerate(refs_per_seg, start=1):
            fh.write(json.dumps({"id": str(i), "refs": list(refs)}, ensure_ascii=False) + "\n")
    return path


def read_jsonl(path: Path):
    out = []
    with open(path, encoding="utf-8") as fh:
        for line in fh.read().split("\n"):
            if line.strip():
                out.append(json.loads(line))
    return out


# ---------------------------------------------------------------------------
# invented vocabulary and corpora

ONSETS = ["", "b", "d", "f", "g", "k", "l", "m", "n", "p", "r", "s", "t", "v", "z",
          "br", "kr", "st", "pl", "tr", "sk", "gl", "dr", "sn", "fl"]
NUCLEI = ["a", "e", "i", "o", "u", "ai", "ou", "ei", "ae", "io"]
CODAS = ["", "", "", "n", "r", "s", "l", "m", "k", "th"]


def invent_vocab(rng: random.Random, size: int):
    words = set()
    while len(words) < size:
        nsyl = rng.choice([1, 1, 2, 2, 2, 3])
        w = "".join(rng.choice(ONSETS) + rng.choice(NUCLEI) + rng.choice(CODAS) for _ in range(nsyl))
        words.add(w)
    words = sorted(words)
    rng.shuffle(words)
    return words


class Zipf:
    """Sample words with probability proportional to 1 / rank**s."""

    def __init__(self, rng: random.Random, words, s=1.1):
        self.rng = rng
        self.words = list(words)
        weights = [1.0 / (r ** s) for r in range(1, len(self.words) + 1)]
        acc, cum = 0.0, []
        for w in weights:
            acc += w
            cum.append(acc)
        self.cum = cum

    def word(self):
        return self.rng.choices(self.words, cum_weights=self.cum, k=1)[0]

    def sentence(self, n):
        return self.rng.choices(self.words, cum_weights=self.cum, k=n)


def mutate(rng: random.Random, zipf: Zipf, tokens, rate):
    """Substitutions, deletions, insertions and adjacent swaps at the given rate."""
    out = []
    for tok in tokens:
        r = rng.random()
        if r < rate * 0.4:
            out.append(zipf.word())  # substitute
        elif r < rate * 0.7:
            pass  # delete
        elif r < rate * 1.0:
            out.append(tok)
            out.append(zipf.word())  # insert
        else:
            out.append(tok)
    if len(out) > 2 and rng.random() < rate:
        i = rng.randrange(len(out) - 1)
        out[i], out[i + 1] = out[i + 1], out[i]
    return out


def resize(rng: random.Random, zipf: Zipf, tokens, n):
    tokens = list(tokens[:n])
    while len(tokens) < n:
        tokens.append(zipf.word())
    return tokens


def make_bleu_corpus(seed, nseg, min_refs=1, max_refs=4, min_hyp_len=4,
                     short_frac=0.0, empty_ref_frac=0.0):
    """Return (hyps, refs_per_seg) as lists of token lists.

    Hypotheses: some copy a reference, some are random, most are mutations of a
    hidden "source" sentence that the references are also mutations of.
    """
    rng = random.Random(seed)
    zipf = Zipf(rng, invent_vocab(rng, 350))
    hyps, refs_all = [], []
    for _ in range(nseg):
        k = rng.randint(min_refs, max_refs)
        base = zipf.sentence(rng.randint(4, 40))
        refs = [mutate(rng, zipf, base, rng.uniform(0.0, 0.45)) for _ in range(k)]
        refs = [r if r else [zipf.word()] for r in refs]
        mode = rng.random()
        if mode < 0.15:
            hyp = list(rng.choice(refs))
        elif mode < 0.27:
            hyp = zipf.sentence(rng.randint(4, 40))
        else:
            hyp = mutate(rng, zipf, base, rng.uniform(0.05, 0.6))
        if short_frac and rng.random() < short_frac:
            hyp = hyp[: rng.randint(0, 3)]
        elif len(hyp) < min_hyp_len:
            hyp = resize(rng, zipf, hyp, min_hyp_len)
        # Ties in the closest reference length (must resolve to the shorter one).
        if k >= 2 and len(hyp) >= 3 and rng.random() < 0.08:
            d = rng.randint(1, min(3, len(hyp) - 1))
            refs[0] = resize(rng, zipf, refs[0], len(hyp) + d)
            refs[1] = resize(rng, zipf, refs[1], len(hyp) - d)
        if empty_ref_frac:
            refs = [[] if rng.random() < empty_ref_frac else r for r in refs]
        hyps.append(hyp)
        refs_all.append(refs)
    return hyps, refs_all


def ngram_count(length, n):
    return max(0, length - n + 1)


# ---------------------------------------------------------------------------
# text with punctuation and non-ASCII for chrF

NONASCII_LETTERS = list("éèêëàâäçñößøåæłğşıžčřőűœ") + list("ждлмнпрстукв") + list("λμνξπρστφψω")
CJK_POOL = list("山水火木金土日月人口手目耳心雨風花鳥")
PUNCT_POOL = [",", ".", "!", "?", ";", ":", "«", "»", "„", "“", "”", "—", "–", "…", "’", "(", ")", "%", "€", "£"]
# Whitespace used in chrF texts: each is whitespace for NLTK's regex \s, for
# Python's str.split() and for Unicode White_Space alike.
SPACES = [" "] * 12 + ["  ", "\t", "\u00a0", "\u3000"]


def _invent_fancy_word(rng):
    n = rng.randint(2, 7)
    chars = []
    for _ in range(n):
        x = rng.random()
        if x < 0.25:
            chars.append(rng.choice(NONASCII_LETTERS))
        else:
            chars.append(rng.choice("abcdefghiklmnoprstuvz"))
    return "".join(chars)


def make_text_vocab(rng, size=250):
    vocab = []
    for i in range(size):
        x = rng.random()
        if x < 0.55:
            vocab.append(invent_vocab(rng, 1)[0])
        elif x < 0.85:
            vocab.append(_invent_fancy_word(rng))
        elif x < 0.95:
            vocab.append("".join(rng.choice(CJK_POOL) for _ in range(rng.randint(1, 4))))
        else:
            vocab.append(rng.choice(["3,5", "12", "٣", "½", "2024", "7.25", "x²"]))
    return vocab


def char_noise(rng, word, rate):
    if rng.random() >= rate or len(word) < 2:
        return word
    chars = list(word)
    op = rng.random()
    i = rng.randrange(len(chars))
    if op < 0.3:
        del chars[i]
    elif op < 0.6:
        chars[i] = rng.choice("aeiouéøж")
    elif op < 0.8 and i + 1 < len(chars):
        chars[i], chars[i + 1] = chars[i + 1], chars[i]
    else:
        chars.insert(i, rng.choice("nrsö"))
    return "".join(chars)


def render(rng, tokens, case_mix=False):
    out = []
    for t in tokens:
        if case_mix:
            x = rng.random()
            t = t.upper() if x < 0.15 else t.capitalize() if x < 0.35 else t
        if rng.random() < 0.15:
            t = t + rng.choice(PUNCT_POOL)
        if rng.random() < 0.05:
            t = rng.choice(PUNCT_POOL) + t
        out.append(t)
        out.append(rng.choice(SPACES))
    if out:
        out.pop()
    return "".join(out)


def make_chrf_corpus(seed, nseg, nrefs=1, case_mix=False, empty_frac=0.0):
    """Return (hyps, refs_per_seg) as lists of strings."""
    rng = random.Random(seed)
    zipf = Zipf(rng, make_text_vocab(rng))
    hyps, refs_all = [], []
    for _ in range(nseg):
        base = zipf.sentence(rng.randint(1, 30))
        refs = []
        for _ in range(nrefs):
            toks = [char_noise(rng, w, 0.15) for w in mutate(rng, zipf, base, rng.uniform(0, 0.4))]
            refs.append(render(rng, toks, case_mix))
        mode = rng.random()
        if mode < 0.1:
            hyp = rng.choice(refs)
        elif mode < 0.2:
            hyp = render(rng, zipf.sentence(rng.randint(1, 30)), case_mix)
        else:
            toks = [char_noise(rng, w, 0.3) for w in mutate(rng, zipf, base, rng.uniform(0, 0.6))]
            hyp = render(rng, toks, case_mix)
        if empty_frac and rng.random() < empty_frac:
            hyp = ""
        if empty_frac and rng.random() < empty_frac:
            refs[0] = ""
        hyps.append(hyp)
        refs_all.append(refs)
    return hyps, refs_all
