"""Outside baselines of `mtgauge bench`, run by the interpreter given with --baseline-python.

Usage:
  python bench_baselines.py nltk REF_FILE HYP_FILE
      NLTK's corpus_bleu (outside reference: NLTK 3.10.4, PyPI, nltk.translate.bleu_score) on
      pre-tokenized, space-separated files with one reference.
  python bench_baselines.py chrf REF_FILE HYP_FILE CHARS WORDS BETA
      A plain implementation of the published definition of chrF (Popovic 2015) and chrF++
      (Popovic 2017, WORDS > 0): character n-grams of orders 1..CHARS with white space removed,
      word n-grams of orders 1..WORDS, per order precision and recall from counts summed over
      the corpus, both averaged over the orders, combined as F-beta.
Each prints one JSON object: {"segments", "seconds" (scoring only), "total_seconds" (reading the
files, splitting and scoring), "score"} and, for nltk, "version". Times are taken inside Python.
"""
import json
import sys
import time
from collections import Counter


def read_lines(path):
    with open(path, encoding="utf-8") as f:
        return [line.rstrip("\n") for line in f]


def nltk_main(ref_path, hyp_path):
    import nltk
    from nltk.translate.bleu_score import corpus_bleu

    start = time.perf_counter()
    refs = [[line.split(" ")] for line in read_lines(ref_path)]
    hyps = [line.split(" ") for line in read_lines(hyp_path)]
    scoring = time.perf_counter()
    bleu = corpus_bleu(refs, hyps)
    end = time.perf_counter()
    return {"version": nltk.__version__, "segments": len(hyps), "seconds": end - scoring, "total_seconds": end - start, "bleu": bleu}


def ngrams(items, n):
    """Counts of the n-grams of a string (substrings) or a list of words (tuples)."""
    if isinstance(items, str):
        return Counter(items[i:i + n] for i in range(len(items) - n + 1))
    return Counter(tuple(items[i:i + n]) for i in range(len(items) - n + 1))


def chrf_stats(hyp, ref, chars, words):
    """Per order (matches, hypothesis n-grams, reference n-grams): characters, then words."""
    out = []
    hc, rc = "".join(hyp.split()), "".join(ref.split())
    for n in range(1, chars + 1):
        h, r = ngrams(hc, n), ngrams(rc, n)
        out.append((sum((h & r).values()), sum(h.values()), sum(r.values())))
    hw, rw = hyp.split(), ref.split()
    for n in range(1, words + 1):
        h, r = ngrams(hw, n), ngrams(rw, n)
        out.append((sum((h & r).values()), sum(h.values()), sum(r.values())))
    return out


def f_score(stats, beta):
    ps = [m / h for m, h, _ in stats if h > 0]
    rs = [m / r for m, _, r in stats if r > 0]
    p = sum(ps) / len(ps) if ps else 0.0
    r = sum(rs) / len(rs) if rs else 0.0
    if p + r == 0:
        return 0.0
    return (1 + beta * beta) * p * r / (beta * beta * p + r)


def chrf_main(ref_path, hyp_path, chars, words, beta):
    start = time.perf_counter()
    refs = read_lines(ref_path)
    hyps = read_lines(hyp_path)
    scoring = time.perf_counter()
    total = None
    for hyp, ref in zip(hyps, refs):
        # One reference per segment here; with several, the one of best sentence F is summed.
        st = chrf_stats(hyp, ref, chars, words)
        total = st if total is None else [tuple(a + b for a, b in zip(x, y)) for x, y in zip(total, st)]
    score = 100 * f_score(total or [], beta)
    end = time.perf_counter()
    return {"segments": len(hyps), "seconds": end - scoring, "total_seconds": end - start, "score": score}


def main():
    mode = sys.argv[1]
    if mode == "nltk":
        out = nltk_main(sys.argv[2], sys.argv[3])
    elif mode == "chrf":
        out = chrf_main(sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5]), float(sys.argv[6]))
    else:
        raise SystemExit(f"unknown mode {mode}")
    print(json.dumps(out))


if __name__ == "__main__":
    main()
