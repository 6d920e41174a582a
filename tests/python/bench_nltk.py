"""Time NLTK's corpus_bleu on a corpus written by `mtgauge bench` (the outside baseline).

Usage: python bench_nltk.py REF_FILE HYP_FILE   (pre-tokenized, space-separated, one reference)
Prints one JSON object: {"version", "segments", "seconds", "bleu"}.
Outside reference: NLTK 3.10.4 (PyPI), nltk.translate.bleu_score.corpus_bleu.
"""
import json
import sys
import time

import nltk
from nltk.translate.bleu_score import corpus_bleu


def main():
    ref_path, hyp_path = sys.argv[1], sys.argv[2]
    with open(ref_path, encoding="utf-8") as f:
        refs = [[line.rstrip("\n").split(" ")] for line in f]
    with open(hyp_path, encoding="utf-8") as f:
        hyps = [line.rstrip("\n").split(" ") for line in f]
    start = time.perf_counter()
    bleu = corpus_bleu(refs, hyps)
    seconds = time.perf_counter() - start
    print(json.dumps({"version": nltk.__version__, "segments": len(hyps), "seconds": seconds, "bleu": bleu}))


if __name__ == "__main__":
    main()
