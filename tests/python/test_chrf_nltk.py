"""chrF / chrF++: mtgauge's n-gram statistics vs NLTK 3.10.4, and the scores
recomputed from those statistics with the published definition.

- Character n-gram statistics per order (1..6) are compared with
  nltk.translate.chrf_score.chrf_precision_recall_fscore_support (NLTK 3.10.4),
  on texts with whitespace removed by NLTK 3.10.4's own chrf preprocessing.
- NLTK's corpus_chrf (beta=3, averages sentence F-scores) is a different
  definition and is NOT compared. The corpus score is recomputed here from the
  per-order counts as in Popović 2015 (WMT15, "chrF: character n-gram F-score
  for automatic MT evaluation"): chrP / chrR = arithmetic mean over orders of
  the per-order precision / recall, F = (1+β²)·P·R / (β²·P + R). (from memory)
- chrF++ word n-grams (orders 1..2 over whitespace-separated words) are counted
  here with collections.Counter over nltk.util.ngrams (NLTK 3.10.4).
"""

from collections import Counter

import pytest
from nltk.translate.chrf_score import _preprocess, chrf_precision_recall_fscore_support
from nltk.util import ngrams

from mtg_helpers import make_chrf_corpus, ngram_count, read_jsonl, write_lines, write_refs_jsonl

TOL = 1e-9
NLTK_EPS = 1e-16  # NLTK 3.10.4 chrf_precision_recall_fscore_support's epsilon default


def nows(text):
    # NLTK 3.10.4 chrf_score._preprocess(sent, ignore_whitespace=True): regex \s+ removed
    s = _preprocess(text, True)
    assert s == "".join(text.split()), "generated text uses a whitespace NLTK and Python disagree on"
    return s


def char_stats_vs_nltk(hyp, ref, where, orders=6):
    """Per-order (matched, candidates, reference) from NLTK 3.10.4 + exact n-gram counts."""
    h, r = nows(hyp), nows(ref)
    stats = []
    for n in range(1, orders + 1):
        prec, rec, _f, tp = chrf_precision_recall_fscore_support(r, h, n)  # NLTK 3.10.4
        nh, nr = ngram_count(len(h), n), ngram_count(len(r), n)
        stats.append((tp, nh, nr, prec, rec))
    return stats


def check_seg_char(ours, hyp, ref, where, bad, orders=6):
    stats = char_stats_vs_nltk(hyp, ref, where, orders)
    for key in ("matched", "candidates", "reference"):
        if len(ours[key]) != orders:
            bad.append((where, f"chars.{key} has {len(ours[key])} orders, expected {orders}"))
            return stats
    for n, (tp, nh, nr, prec, rec) in enumerate(stats, start=1):
        m, oh, orf = ours["matched"][n - 1], ours["candidates"][n - 1], ours["reference"][n - 1]
        if (m, oh, orf) != (tp, nh, nr):
            bad.append((where, n, "counts (matched,candidates,reference)", (m, oh, orf), "expected",
                        (tp, nh, nr), repr(hyp), repr(ref)))
            continue
        if tp > 0:
            # NLTK 3.10.4: prec = tp/tpfp, rec = tp/tpfn
            if abs(prec - m / oh) > 1e-15 or abs(rec - m / orf) > 1e-15:
                bad.append((where, n, "prec/rec", (m / oh, m / orf), (prec, rec)))
        else:
            # NLTK 3.10.4 returns epsilon for all three on ZeroDivisionError
            # (no n-grams on one side, or no match so that P+R == 0).
            if not (oh == 0 or orf == 0 or (prec == 0 and rec == 0) or
                    (prec == NLTK_EPS and rec == NLTK_EPS)):
                bad.append((where, n, "zero-match case", prec, rec))
    return stats


def fscore_from_counts(matches, hyp, ref, beta):
    """Popović 2015 (from memory): mean per-order P and R, then F-beta, 0-100 scale."""
    k = len(matches)
    P = sum(m / h for m, h in zip(matches, hyp)) / k
    R = sum(m / r for m, r in zip(matches, ref)) / k
    b2 = beta * beta
    F = 0.0 if P + R == 0 else (1 + b2) * P * R / (b2 * P + R)
    return 100 * F, 100 * P, 100 * R


def word_stats(hyp, ref, n):
    # words = whitespace-separated tokens; Counter over NLTK 3.10.4 nltk.util.ngrams
    hc = Counter(ngrams(hyp.split(), n))
    rc = Counter(ngrams(ref.split(), n))
    return sum((hc & rc).values()), sum(hc.values()), sum(rc.values())


def run_chrf(mtgauge, tmp_path, hyps, refs_per_seg, metrics=("chrf",), extra=()):
    """Score with one `--metric SPEC` per entry of `metrics`; return (corpus JSON, segments)."""
    hyp = write_lines(tmp_path / "hyp.txt", hyps)
    nref = len(refs_per_seg[0])
    if all(len(r) == nref for r in refs_per_seg) and nref <= 2:
        ref_args = []
        for j in range(nref):
            ref_args += ["--ref", write_lines(tmp_path / f"ref{j}.txt", [rs[j] for rs in refs_per_seg])]
    else:
        ref_args = ["--ref", write_refs_jsonl(tmp_path / "refs.jsonl", refs_per_seg)]
    seg_file = tmp_path / "seg.jsonl"
    metric_args = [a for spec in metrics for a in ("--metric", spec)]
    out = mtgauge.score_json([*ref_args, "--hyp", hyp, "--tokenizer", "whitespace",
                              *metric_args, "--per-segment", seg_file, *extra])
    segs = read_jsonl(seg_file)
    assert out["segments"] == len(hyps) and len(segs) == len(hyps)
    return out, segs


def test_chrf_char_counts_and_corpus_score(mtgauge, tmp_path):
    hyps, refs = make_chrf_corpus(seed=2718, nseg=2000, nrefs=1, empty_frac=0.02)
    assert any(h == "" for h in hyps) and any(rs[0] == "" for rs in refs)
    assert any(ord(c) > 0x7F for h in hyps for c in h)
    out, segs = run_chrf(mtgauge, tmp_path, hyps, refs)
    bad = []
    tot = {"matched": [0] * 6, "candidates": [0] * 6, "reference": [0] * 6}
    seg_scores_checked = 0
    for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
        c = seg["chrf"]
        if seg["id"] != str(i + 1):
            bad.append((i, "id", seg["id"]))
        if c.get("chosen") != 0:
            bad.append((i, "chosen ref index with a single reference", c.get("chosen")))
        if "words" in c:
            bad.append((i, "chrF (no word orders) has a words object", c["words"]))
        stats = check_seg_char(c["chars"], h, rs[0], i, bad)
        for n, (tp, nh, nr, _p, _r) in enumerate(stats):
            tot["matched"][n] += tp
            tot["candidates"][n] += nh
            tot["reference"][n] += nr
        if all(s[1] > 0 and s[2] > 0 for s in stats):
            want, _, _ = fscore_from_counts([s[0] for s in stats], [s[1] for s in stats],
                                            [s[2] for s in stats], 2.0)
            seg_scores_checked += 1
            if abs(c["score"] - want) > TOL:
                bad.append((i, "segment score (Popović 2015 definition)", c["score"], want))
    assert not bad, f"{len(bad)} mismatches; first: {bad[:4]}"
    assert seg_scores_checked > 1000
    chrf = out["chrf"]
    assert chrf["chars"] == tot, "corpus char statistics must be the sums over segments"
    assert "words" not in chrf and "beta" not in chrf and "chosen" not in chrf, sorted(chrf)
    assert all(x > 0 for x in tot["candidates"] + tot["reference"])
    want, P, R = fscore_from_counts(tot["matched"], tot["candidates"], tot["reference"], 2.0)
    assert chrf["score"] == pytest.approx(want, abs=TOL), "Popović 2015 chrF, beta=2"
    assert chrf["precision"] == pytest.approx(P, abs=TOL)
    assert chrf["recall"] == pytest.approx(R, abs=TOL)
    assert out["config"]["metrics"]["chrf"] == {"chars": 6, "words": 0, "beta": 2.0}


@pytest.mark.parametrize("beta", [1.0, 3.0])
def test_chrf_other_beta(mtgauge, tmp_path, beta):
    hyps, refs = make_chrf_corpus(seed=161, nseg=500, nrefs=1)
    out, _segs = run_chrf(mtgauge, tmp_path, hyps, refs, metrics=[f"chrf:beta={beta}"])
    ch = out["chrf"]["chars"]
    want, _, _ = fscore_from_counts(ch["matched"], ch["candidates"], ch["reference"], beta)
    assert out["chrf"]["score"] == pytest.approx(want, abs=TOL)
    assert out["config"]["metrics"]["chrf"]["beta"] == beta


def test_chrf_multi_reference_chosen_ref_counts(mtgauge, tmp_path):
    hyps, refs = make_chrf_corpus(seed=3141, nseg=800, nrefs=3)
    out, segs = run_chrf(mtgauge, tmp_path, hyps, refs)
    bad = []
    tot = {"matched": [0] * 6, "candidates": [0] * 6, "reference": [0] * 6}
    chosen = Counter()
    for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
        c = seg["chrf"]
        j = c["chosen"]
        if not (isinstance(j, int) and 0 <= j < len(rs)):
            bad.append((i, "ref index out of range (0-based expected)", j))
            continue
        chosen[j] += 1
        stats = check_seg_char(c["chars"], h, rs[j], i, bad)
        for n, (tp, nh, nr, _p, _r) in enumerate(stats):
            tot["matched"][n] += tp
            tot["candidates"][n] += nh
            tot["reference"][n] += nr
    assert not bad, f"{len(bad)} mismatches; first: {bad[:4]}"
    assert len(chosen) > 1, f"the chosen reference is always the same one: {chosen}"
    assert out["chrf"]["chars"] == tot
    want, _, _ = fscore_from_counts(tot["matched"], tot["candidates"], tot["reference"], 2.0)
    assert out["chrf"]["score"] == pytest.approx(want, abs=TOL)


def test_chrf_plus_plus_word_counts(mtgauge, tmp_path):
    hyps, refs = make_chrf_corpus(seed=1618, nseg=1500, nrefs=1, empty_frac=0.01)
    out, segs = run_chrf(mtgauge, tmp_path, hyps, refs, metrics=["chrf++"])
    assert "chrf++" in out and "bleu" not in out
    cpp = out["chrf++"]
    wt = {"matched": [0] * 2, "candidates": [0] * 2, "reference": [0] * 2}
    ct = {"matched": [0] * 6, "candidates": [0] * 6, "reference": [0] * 6}
    bad = []
    for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
        for n in (1, 2):
            m, nh, nr = word_stats(h, rs[0], n)
            wt["matched"][n - 1] += m
            wt["candidates"][n - 1] += nh
            wt["reference"][n - 1] += nr
            if "chrf++" in seg:
                w = seg["chrf++"]["words"]
                if (w["matched"][n - 1], w["candidates"][n - 1], w["reference"][n - 1]) != (m, nh, nr):
                    bad.append((i, n, "words", w, (m, nh, nr), repr(h), repr(rs[0])))
        key = "chrf++" if "chrf++" in seg else "chrf"
        stats = check_seg_char(seg[key]["chars"], h, rs[0], i, bad)
        for n, (tp, nh, nr, _p, _r) in enumerate(stats):
            ct["matched"][n] += tp
            ct["candidates"][n] += nh
            ct["reference"][n] += nr
    assert not bad, f"{len(bad)} mismatches; first: {bad[:4]}"
    assert cpp["words"] == wt, "corpus word n-gram statistics (Counter over nltk.util.ngrams)"
    assert cpp["chars"] == ct
    # chrF++ (Popović 2017, WMT17, "chrF++: words helping character n-grams"; from
    # memory): P and R are averaged over the 6 character AND 2 word orders together.
    m = ct["matched"] + wt["matched"]
    hh = ct["candidates"] + wt["candidates"]
    rr = ct["reference"] + wt["reference"]
    want, P, R = fscore_from_counts(m, hh, rr, 2.0)
    assert cpp["score"] == pytest.approx(want, abs=TOL)
    assert cpp["precision"] == pytest.approx(P, abs=TOL)
    assert cpp["recall"] == pytest.approx(R, abs=TOL)


def test_chrf_caseless(mtgauge, tmp_path):
    hyps, refs = make_chrf_corpus(seed=4669, nseg=1000, nrefs=1, case_mix=True)
    # a few characters whose lowercase is special in Python's str.lower():
    # İ -> "i̇" (two code points), final sigma ς, KELVIN SIGN -> ASCII k, ẞ -> ß
    specials = ["İstanbulo", "ΟΔΟΣ", "ΣΑΣ,", "ΑΣΑ", "\u212Aelvo", "\u212Bngo", "ẞTRAMO", "ÉTÉ", "ØRNA"]
    for i in range(0, len(hyps), 7):
        hyps[i] = hyps[i] + " " + specials[i % len(specials)]
        if i % 2:
            refs[i][0] = specials[(i + 3) % len(specials)] + " " + refs[i][0]
    out, segs = run_chrf(mtgauge, tmp_path, hyps, refs, metrics=["chrf", "chrf++"], extra=["--caseless"])
    assert out["config"]["caseless"] is True
    bad = []
    ct = {"matched": [0] * 6, "candidates": [0] * 6, "reference": [0] * 6}
    wt = {"matched": [0] * 2, "candidates": [0] * 2, "reference": [0] * 2}
    for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
        hl, rl = h.lower(), rs[0].lower()  # Python str.lower()
        stats = check_seg_char(seg["chrf"]["chars"], hl, rl, i, bad)
        for n, (tp, nh, nr, _p, _r) in enumerate(stats):
            ct["matched"][n] += tp
            ct["candidates"][n] += nh
            ct["reference"][n] += nr
        for n in (1, 2):
            m, nh, nr = word_stats(hl, rl, n)
            wt["matched"][n - 1] += m
            wt["candidates"][n - 1] += nh
            wt["reference"][n - 1] += nr
    assert not bad, f"{len(bad)} mismatches; first: {bad[:4]}"
    assert out["chrf"]["chars"] == ct
    assert out["chrf++"]["chars"] == ct
    assert out["chrf++"]["words"] == wt
    # without --caseless the counts must be different (the data is mixed-case)
    out_cased, _ = run_chrf(mtgauge, tmp_path, hyps, refs, metrics=["chrf"])
    assert out_cased["chrf"]["chars"]["matched"] != ct["matched"]


def zero_counts(orders):
    return {"matched": [0] * orders, "candidates": [0] * orders, "reference": [0] * orders}


def add_stats(tot, stats):
    for n, (tp, nh, nr, *_rest) in enumerate(stats):
        tot["matched"][n] += tp
        tot["candidates"][n] += nh
        tot["reference"][n] += nr


def test_chrf_and_chrf_plus_plus_each_with_their_own_parameters(mtgauge, tmp_path):
    """chrF with 4 character orders and beta 1 next to chrF++ with 6 character orders, 1 word
    order and beta 3, in one run: each metric's counts and scores follow its own parameters."""
    hyps, refs = make_chrf_corpus(seed=5772, nseg=1200, nrefs=1, empty_frac=0.01)
    out, segs = run_chrf(mtgauge, tmp_path, hyps, refs,
                         metrics=["chrf:chars=4,beta=1", "chrf++:chars=6,words=1,beta=3"])
    assert "bleu" not in out
    assert out["config"]["metrics"] == {
        "chrf": {"chars": 4, "words": 0, "beta": 1.0},
        "chrf++": {"chars": 6, "words": 1, "beta": 3.0},
    }
    c4, c6, w1 = zero_counts(4), zero_counts(6), zero_counts(1)
    bad = []
    checked = {"chrf": 0, "chrf++": 0}
    for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
        a, b = seg["chrf"], seg["chrf++"]
        if a.get("chosen") != 0 or b.get("chosen") != 0:
            bad.append((i, "chosen ref index with a single reference", a.get("chosen"), b.get("chosen")))
        if "words" in a:
            bad.append((i, "chrf:words=0 has a words object", a["words"]))
        s4 = check_seg_char(a["chars"], h, rs[0], i, bad, orders=4)
        s6 = check_seg_char(b["chars"], h, rs[0], i, bad, orders=6)
        m, nh, nr = word_stats(h, rs[0], 1)  # Counter over NLTK 3.10.4 nltk.util.ngrams
        w = b["words"]
        if (w["matched"], w["candidates"], w["reference"]) != ([m], [nh], [nr]):
            bad.append((i, "chrf++ words (1 order)", w, (m, nh, nr), repr(h), repr(rs[0])))
        add_stats(c4, s4)
        add_stats(c6, s6)
        add_stats(w1, [(m, nh, nr)])
        # sentence scores, Popović 2015 / 2017 (from memory), where every order has n-grams
        if all(s[1] > 0 and s[2] > 0 for s in s4):
            want, _, _ = fscore_from_counts([s[0] for s in s4], [s[1] for s in s4],
                                            [s[2] for s in s4], 1.0)
            checked["chrf"] += 1
            if abs(a["score"] - want) > TOL:
                bad.append((i, "chrf segment score (chars=4, beta=1)", a["score"], want))
        if all(s[1] > 0 and s[2] > 0 for s in s6) and nh > 0 and nr > 0:
            want, _, _ = fscore_from_counts([s[0] for s in s6] + [m], [s[1] for s in s6] + [nh],
                                            [s[2] for s in s6] + [nr], 3.0)
            checked["chrf++"] += 1
            if abs(b["score"] - want) > TOL:
                bad.append((i, "chrf++ segment score (chars=6, words=1, beta=3)", b["score"], want))
    assert not bad, f"{len(bad)} mismatches; first: {bad[:4]}"
    assert checked["chrf"] > 800 and checked["chrf++"] > 600, checked

    chrf, cpp = out["chrf"], out["chrf++"]
    assert chrf["chars"] == c4, "chrF: 4 character orders, the sums over segments"
    assert "words" not in chrf
    assert cpp["chars"] == c6, "chrF++: 6 character orders, the sums over segments"
    assert cpp["words"] == w1, "chrF++: 1 word order (Counter over nltk.util.ngrams)"
    assert all(x > 0 for x in c4["candidates"] + c4["reference"] + c6["candidates"]
               + c6["reference"] + w1["candidates"] + w1["reference"])

    # chrF: mean over the 4 character orders, F with beta 1 (Popović 2015, from memory)
    want, P, R = fscore_from_counts(c4["matched"], c4["candidates"], c4["reference"], 1.0)
    assert chrf["score"] == pytest.approx(want, abs=TOL)
    assert chrf["precision"] == pytest.approx(P, abs=TOL)
    assert chrf["recall"] == pytest.approx(R, abs=TOL)
    # beta matters here: the default beta 2 would give another score
    other, _, _ = fscore_from_counts(c4["matched"], c4["candidates"], c4["reference"], 2.0)
    assert abs(other - want) > 1e-6, (other, want)

    # chrF++: mean over 6 character + 1 word orders, F with beta 3 (Popović 2017, from memory)
    want, P, R = fscore_from_counts(c6["matched"] + w1["matched"],
                                    c6["candidates"] + w1["candidates"],
                                    c6["reference"] + w1["reference"], 3.0)
    assert cpp["score"] == pytest.approx(want, abs=TOL)
    assert cpp["precision"] == pytest.approx(P, abs=TOL)
    assert cpp["recall"] == pytest.approx(R, abs=TOL)
    other, _, _ = fscore_from_counts(c6["matched"] + w1["matched"],
                                     c6["candidates"] + w1["candidates"],
                                     c6["reference"] + w1["reference"], 2.0)
    assert abs(other - want) > 1e-6, (other, want)
