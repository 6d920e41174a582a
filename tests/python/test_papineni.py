"""Papineni et al. 2002 (ACL, "BLEU: a method for automatic evaluation of machine
translation") worked examples, as reproduced in NLTK 3.10.4's
nltk/translate/bleu_score.py doctests.

The sentences are read at test time from the doctests of NLTK's installed
source (modified_precision and corpus_bleu docstrings), not copied here. The
fractions are the paper's values (from memory); NLTK's modified_precision is
checked to give the same numerators/denominators.
"""

import ast
import doctest
import warnings

import nltk.translate.bleu_score as bleu_mod
import pytest
from nltk.translate.bleu_score import corpus_bleu, modified_precision, sentence_bleu

from mtg_helpers import read_jsonl, write_lines, write_refs_jsonl


def doctest_snapshots(func):
    """Run the assignment examples of func's doctest; snapshot at each `references =`."""
    finder = doctest.DocTestFinder()
    (test,) = [t for t in finder.find(func, func.__name__, module=bleu_mod) if t.name == func.__name__]
    ns, snaps = {}, []
    for ex in test.examples:
        tree = ast.parse(ex.source)
        if tree.body and all(isinstance(node, ast.Assign) for node in tree.body):
            exec(compile(tree, "<nltk doctest>", "exec"), dict(vars(bleu_mod)), ns)
            snaps.append(dict(ns))
    return snaps


@pytest.fixture(scope="module")
def mp_examples():
    snaps = doctest_snapshots(bleu_mod.modified_precision)
    # "the the the ..." example: two references and a 7-token candidate
    thethe = next(s for s in snaps if "hypothesis1" in s and set(s["hypothesis1"]) == {"the"}
                  and "references" in s and len(s["references"]) == 2)
    # "guide to action" example: three references, candidates 1 and 2
    guide = [s for s in snaps if "hypothesis2" in s and "references" in s and len(s["references"]) == 3][-1]
    return thethe, guide


def per_segment(mtgauge, tmp_path, hyps, refs_per_seg):
    """Run mtgauge with whitespace tokenization; return per-segment bleu objects."""
    hyp = write_lines(tmp_path / "hyp.txt", [" ".join(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[" ".join(r) for r in rs] for rs in refs_per_seg])
    seg_file = tmp_path / "seg.jsonl"
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu:smoothing=none", "--per-segment", seg_file])
    return out, [s["bleu"] for s in read_jsonl(seg_file)]


def test_the_the_the(mtgauge, tmp_path, mp_examples):
    thethe, _ = mp_examples
    refs, hyp = thethe["references"], thethe["hypothesis1"]
    assert len(hyp) == 7
    # Papineni et al. 2002: modified unigram precision 2/7 (from memory)
    p = modified_precision(refs, hyp, 1)  # NLTK 3.10.4
    assert (p.numerator, p.denominator) == (2, 7)
    # plain line-aligned files, one per reference stream
    h = write_lines(tmp_path / "thethe_hyp.txt", [" ".join(hyp)])
    r1 = write_lines(tmp_path / "thethe_ref1.txt", [" ".join(refs[0])])
    r2 = write_lines(tmp_path / "thethe_ref2.txt", [" ".join(refs[1])])
    seg_file = tmp_path / "seg.jsonl"
    mtgauge.score_json(["--ref", r1, "--ref", r2, "--hyp", h, "--tokenizer", "whitespace",
                        "--metric", "bleu", "--per-segment", seg_file])
    (seg,) = read_jsonl(seg_file)
    assert (seg["bleu"]["matched"][0], seg["bleu"]["candidates"][0]) == (2, 7)  # Papineni et al. 2002
    # the unsmoothed sentence precision on the 0-100 scale: 2/7 (Papineni et al. 2002)
    assert seg["bleu"]["precision"][0] == pytest.approx(100 * 2 / 7, abs=1e-9)


def test_guide_to_action(mtgauge, tmp_path, mp_examples):
    _, guide = mp_examples
    refs = guide["references"]
    c1, c2 = guide["hypothesis1"], guide["hypothesis2"]
    assert (len(c1), len(c2)) == (18, 14)
    # Papineni et al. 2002 (from memory): candidate 1 p1 = 17/18, p2 = 10/17;
    # candidate 2 p1 = 8/14, p2 = 1/13.
    expected = {0: [(17, 18), (10, 17)], 1: [(8, 14), (1, 13)]}
    for k, cand in enumerate([c1, c2]):
        for n in (1, 2):
            p = modified_precision(refs, cand, n)  # NLTK 3.10.4
            assert (p.numerator, p.denominator) == expected[k][n - 1]
    out, segs = per_segment(mtgauge, tmp_path, [c1, c2], [refs, refs])
    for k in (0, 1):
        got = [(segs[k]["matched"][n], segs[k]["candidates"][n]) for n in (0, 1)]
        assert got == expected[k], f"candidate {k + 1}"  # Papineni et al. 2002
        for n in (0, 1):  # the same fractions as unsmoothed sentence precisions, 0-100
            m, t = expected[k][n]
            assert segs[k]["precision"][n] == pytest.approx(100 * m / t, abs=1e-9), (k, n)
    # sentence BLEU of candidate 1 vs NLTK 3.10.4 sentence_bleu (doctest: 0.5045...)
    assert segs[0]["score"] == pytest.approx(100 * sentence_bleu(refs, c1), abs=1e-9)
    # candidate 2 has no 3-gram match: 0 without smoothing (NLTK 3.10.4 doctest: round(.,4) == 0.0)
    assert segs[1]["score"] == 0.0


def test_corpus_bleu_doctest_corpus(mtgauge, tmp_path):
    snaps = doctest_snapshots(bleu_mod.corpus_bleu)
    s = next(x for x in snaps if "list_of_references" in x and "hypotheses" in x)
    lor, hyps = s["list_of_references"], s["hypotheses"]
    assert [len(r) for r in lor] == [3, 1]  # varying reference counts -> JSONL refs
    out, _ = per_segment(mtgauge, tmp_path, hyps, lor)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        want = 100 * corpus_bleu(lor, hyps)  # NLTK 3.10.4 (its doctest prints 0.5920...)
    assert out["bleu"]["score"] == pytest.approx(want, abs=1e-9)
    assert 59.20 <= out["bleu"]["score"] < 59.21  # NLTK 3.10.4 corpus_bleu doctest: 0.5920...
