"""BLEU: mtgauge vs NLTK 3.10.4 (nltk.translate.bleu_score) on generated corpora.

Every expected value below comes from NLTK 3.10.4's bleu_score module
(modified_precision, closest_ref_length, brevity_penalty, corpus_bleu,
sentence_bleu, SmoothingFunction), or is computed in the test from NLTK's
integer statistics where the contract says mtgauge deliberately differs
(true n-gram totals instead of NLTK's max(1, count) denominators; shortest
reference length, which NLTK does not offer).
"""

import math
import warnings

import pytest
from nltk.translate.bleu_score import (
    SmoothingFunction,
    brevity_penalty,
    closest_ref_length,
    corpus_bleu,
    modified_precision,
    sentence_bleu,
)

from mtg_helpers import (
    make_bleu_corpus,
    ngram_count,
    read_jsonl,
    write_lines,
    write_refs_jsonl,
)

TOL = 1e-9  # absolute, on mtgauge's 0-100 scale


def join(tokens):
    return " ".join(tokens)


def nltk_corpus_stats(hyps, refs):
    """Sums of NLTK 3.10.4 modified_precision numerators/denominators, lengths."""
    num, den = [0] * 4, [0] * 4
    c = r = 0
    for hyp, rs in zip(hyps, refs):
        for n in range(1, 5):
            p = modified_precision(rs, hyp, n)  # NLTK 3.10.4
            num[n - 1] += p.numerator
            den[n - 1] += p.denominator
        c += len(hyp)
        r += closest_ref_length(rs, len(hyp))  # NLTK 3.10.4
    return num, den, c, r


def bleu_from_counts(matches, totals, c, r):
    """The contract's corpus BLEU formula (0-100)."""
    if c == 0:
        bp = 0.0
    elif c > r:
        bp = 1.0
    else:
        bp = math.exp(1 - r / c)
    if any(m == 0 for m in matches) or any(t == 0 for t in totals):
        return 0.0, bp
    return 100 * bp * math.exp(sum(math.log(m / t) for m, t in zip(matches, totals)) / 4), bp


def nltk_corpus_bleu_100(refs, hyps):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # method0 warns on zero counts
        return 100 * corpus_bleu(refs, hyps)  # NLTK 3.10.4, uniform weights, no smoothing


def check_corpus_bleu(out, hyps, refs):
    num, den, c, r = nltk_corpus_stats(hyps, refs)
    bleu = out["bleu"]
    assert out["segments"] == len(hyps)
    assert bleu["matched"] == num, "matched vs sum of NLTK 3.10.4 modified_precision numerators"
    assert bleu["candidates"] == den, "candidates vs sum of NLTK 3.10.4 modified_precision denominators"
    assert bleu["tokens"]["hypothesis"] == c, "tokens.hypothesis vs sum of len(hyp)"
    assert bleu["tokens"]["reference"] == r, "tokens.reference vs sum of NLTK 3.10.4 closest_ref_length"
    # contract: tokens.ratio = hypothesis / reference (0 when reference is 0)
    assert bleu["tokens"]["ratio"] == pytest.approx(c / r if r else 0.0, abs=1e-12)
    # NLTK 3.10.4 brevity_penalty(closest_ref_len, hyp_len)
    assert bleu["brevity"] == pytest.approx(brevity_penalty(r, c), abs=1e-12)
    for n in range(4):
        assert bleu["precision"][n] == pytest.approx(100 * num[n] / den[n], abs=TOL)
    # NLTK 3.10.4 corpus_bleu, scaled to 0-100
    expected = nltk_corpus_bleu_100(refs, hyps)
    assert bleu["score"] == pytest.approx(expected, abs=TOL), (bleu["score"], expected)
    return num, den, c, r


def test_corpus_bleu_jsonl_varying_reference_counts(mtgauge, tmp_path):
    hyps, refs = make_bleu_corpus(seed=20240611, nseg=3000, min_refs=1, max_refs=4)
    assert min(len(h) for h in hyps) >= 4  # NLTK's max(1, .) denominators == true counts
    assert {len(r) for r in refs} == {1, 2, 3, 4}
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs])
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu"])
    check_corpus_bleu(out, hyps, refs)
    assert "chrf" not in out and "chrf++" not in out  # only the requested metric
    assert 0 < out["bleu"]["score"] < 100


def test_corpus_bleu_two_plain_reference_streams(mtgauge, tmp_path):
    hyps, refs = make_bleu_corpus(seed=777, nseg=1500, min_refs=2, max_refs=2)
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps])
    r1 = write_lines(tmp_path / "ref1.txt", [join(rs[0]) for rs in refs])
    r2 = write_lines(tmp_path / "ref2.txt", [join(rs[1]) for rs in refs])
    # no --metric: the defaults bleu and chrf
    out = mtgauge.score_json(["--ref", r1, "--ref", r2, "--hyp", hyp, "--tokenizer", "whitespace"])
    assert "bleu" in out and "chrf" in out and "chrf++" not in out
    check_corpus_bleu(out, hyps, refs)


def test_corpus_bleu_config_echo(mtgauge, tmp_path):
    hyps, refs = make_bleu_corpus(seed=31, nseg=20)
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs])
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu:smoothing=plus-one,ref-length=shortest",
                              "--metric", "chrf:beta=3", "--metric", "chrf++:beta=3"])
    cfg = out["config"]
    assert cfg["tokenizer"] == "whitespace"
    assert cfg["caseless"] is False
    assert list(cfg["metrics"]) == ["bleu", "chrf", "chrf++"]
    bleu, chrf, cpp = cfg["metrics"]["bleu"], cfg["metrics"]["chrf"], cfg["metrics"]["chrf++"]
    assert bleu["order"] == 4
    assert bleu["ref-length"] == "shortest"
    assert bleu["smoothing"] == "plus-one"
    assert bleu["epsilon"] == 0.1
    assert (chrf["chars"], chrf["words"]) == (6, 0)
    assert (cpp["chars"], cpp["words"]) == (6, 2)
    assert chrf["beta"] == 3.0 and cpp["beta"] == 3.0
    # the flat keys of the old configuration are gone
    for old in ("lowercase", "bleu_order", "ref_length", "smoothing", "chrf_char_order",
                "chrf_word_order", "beta"):
        assert old not in cfg, old
    assert out["segments"] == 20
    # the human output describes the same configuration on its one `config` line
    args = ["score", "--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
            "--metric", "bleu:smoothing=plus-one,ref-length=shortest",
            "--metric", "chrf:beta=3", "--metric", "chrf++:beta=3"]
    text = mtgauge.run_ok(args).stdout.decode("utf-8")
    config_lines = [l.split(None, 1) for l in text.split("\n") if l.strip().startswith("config ")]
    assert [rest for _, rest in config_lines] == [
        "tokenizer=whitespace caseless=no "
        "bleu:order=4,ref-length=shortest,smoothing=plus-one,epsilon=0.1 "
        "chrf:chars=6,words=0,beta=3 chrf++:chars=6,words=2,beta=3"], text


def test_ref_length_shortest(mtgauge, tmp_path):
    hyps, refs = make_bleu_corpus(seed=4242, nseg=2000, min_refs=1, max_refs=4)
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs])
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu:ref-length=shortest"])
    num, den, c, _ = nltk_corpus_stats(hyps, refs)
    r_short = sum(min(len(r) for r in rs) for rs in refs)  # computed here, not by NLTK
    bleu = out["bleu"]
    assert bleu["matched"] == num and bleu["candidates"] == den and bleu["tokens"]["hypothesis"] == c
    assert bleu["tokens"]["reference"] == r_short
    expected, bp = bleu_from_counts(num, den, c, r_short)
    # exp(1 - r/c) with NLTK 3.10.4's brevity_penalty on the shortest lengths
    assert bp == pytest.approx(brevity_penalty(r_short, c), abs=1e-15)
    assert bleu["brevity"] == pytest.approx(bp, abs=1e-12)
    assert bleu["score"] == pytest.approx(expected, abs=TOL)
    assert out["config"]["metrics"]["bleu"]["ref-length"] == "shortest"


def test_per_segment_counts_short_hyps_and_empty_refs(mtgauge, tmp_path):
    hyps, refs = make_bleu_corpus(seed=99, nseg=1500, min_refs=1, max_refs=4,
                                  short_frac=0.3, empty_ref_frac=0.1)
    # make sure the interesting cases are really there
    assert any(len(h) == 0 for h in hyps) and any(len(h) == 3 for h in hyps)
    assert any(any(len(r) == 0 for r in rs) for rs in refs)
    refs[7] = [[], []]  # a segment whose references are all empty
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs])
    seg_file = tmp_path / "seg.jsonl"
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu", "--per-segment", seg_file])
    segs = read_jsonl(seg_file)
    assert len(segs) == len(hyps)
    sum_m, sum_t, sum_c, sum_r = [0] * 4, [0] * 4, 0, 0
    bad = []
    for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
        b = seg["bleu"]
        if seg["id"] != str(i + 1):
            bad.append((i, "id", seg["id"]))
        for n in range(1, 5):
            p = modified_precision(rs, h, n)  # NLTK 3.10.4
            ours_m, ours_t = b["matched"][n - 1], b["candidates"][n - 1]
            # contract: true count of hypothesis n-grams (0 if shorter than n)
            if ours_t != ngram_count(len(h), n):
                bad.append((i, f"candidates[{n}]", ours_t, ngram_count(len(h), n)))
            # NLTK 3.10.4 uses max(1, count) as its denominator
            if p.denominator != max(1, ours_t) or p.numerator != ours_m:
                bad.append((i, f"order {n}", (ours_m, ours_t), (p.numerator, p.denominator)))
            # the unsmoothed sentence precision, 0-100 (NLTK 3.10.4 modified_precision as a
            # fraction; only where the hypothesis has n-grams of this order)
            if ours_t > 0 and abs(b["precision"][n - 1] - 100 * p.numerator / p.denominator) > TOL:
                bad.append((i, f"precision[{n}]", b["precision"][n - 1],
                            100 * p.numerator / p.denominator))
            sum_m[n - 1] += ours_m
            sum_t[n - 1] += ours_t
        if len(b["precision"]) != 4:
            bad.append((i, "precision has not one entry per order", b["precision"]))
        if b["tokens"]["hypothesis"] != len(h):
            bad.append((i, "tokens.hypothesis", b["tokens"]["hypothesis"], len(h)))
        r = closest_ref_length(rs, len(h))  # NLTK 3.10.4
        if b["tokens"]["reference"] != r:
            bad.append((i, "tokens.reference", b["tokens"]["reference"], r))
        # NLTK 3.10.4 brevity_penalty(closest_ref_len, hyp_len) of the segment
        if abs(b["brevity"] - brevity_penalty(r, len(h))) > 1e-12:
            bad.append((i, "brevity", b["brevity"], brevity_penalty(r, len(h))))
        sum_c += len(h)
        sum_r += r
    assert not bad, f"{len(bad)} per-segment mismatches, first: {bad[:5]} " \
                    f"(hyp={hyps[bad[0][0]]!r}, refs={refs[bad[0][0]]!r})"
    # corpus statistics are the sums of the per-segment ones
    bleu = out["bleu"]
    assert bleu["matched"] == sum_m and bleu["candidates"] == sum_t
    assert bleu["tokens"]["hypothesis"] == sum_c and bleu["tokens"]["reference"] == sum_r
    expected, _ = bleu_from_counts(sum_m, sum_t, sum_c, sum_r)
    assert bleu["score"] == pytest.approx(expected, abs=TOL)


SMOOTHINGS = [
    # (mtgauge --metric spec, NLTK 3.10.4 SmoothingFunction method name, epsilon)
    ("bleu:smoothing=none", "method0", 0.1),
    ("bleu:smoothing=epsilon", "method1", 0.1),
    ("bleu:smoothing=epsilon,epsilon=0.05", "method1", 0.05),
    ("bleu:smoothing=epsilon,epsilon=0.5", "method1", 0.5),
    ("bleu:smoothing=plus-one", "method2", 0.1),
    ("bleu:smoothing=nist-halving", "method3", 0.1),
]


@pytest.fixture(scope="module")
def smoothing_corpus():
    hyps, refs = make_bleu_corpus(seed=5150, nseg=1200, min_refs=1, max_refs=4, short_frac=0.2)
    return hyps, refs


@pytest.mark.parametrize("spec,method,eps", SMOOTHINGS, ids=[s[0].split(":", 1)[1] for s in SMOOTHINGS])
def test_sentence_bleu_smoothing(mtgauge, tmp_path, smoothing_corpus, spec, method, eps):
    hyps, refs = smoothing_corpus
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs])
    seg_file = tmp_path / "seg.jsonl"
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", spec, "--per-segment", seg_file])
    segs = read_jsonl(seg_file)
    assert len(segs) == len(hyps)
    assert out["config"]["metrics"]["bleu"]["epsilon"] == eps
    fn = getattr(SmoothingFunction(epsilon=eps), method)  # NLTK 3.10.4
    bad, compared, nonzero = [], 0, 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, (seg, h, rs) in enumerate(zip(segs, hyps, refs)):
            got = seg["bleu"]["score"]
            # NLTK 3.10.4 sentence_bleu, uniform weights, scaled to 0-100
            want = 100 * sentence_bleu(rs, h, smoothing_function=fn)
            if method == "method0":
                nums = [modified_precision(rs, h, n).numerator for n in range(1, 5)]
                if min(nums) == 0:
                    want = 0.0  # NLTK gives ~1e-77 (sys.float_info.min); contract: 0
            compared += 1
            nonzero += want > 0
            if not abs(got - want) <= TOL:
                bad.append((i, got, want, join(h), [join(r) for r in rs]))
    assert compared == len(hyps) and nonzero > 100
    assert not bad, f"{len(bad)} sentence BLEU mismatches vs NLTK {method}; first: {bad[:3]}"
    # The corpus score is defined without smoothing, whatever bleu:smoothing says.
    num, den, c, r = nltk_corpus_stats(hyps, refs)
    true_totals = [sum(ngram_count(len(h), n) for h in hyps) for n in range(1, 5)]
    expected, _ = bleu_from_counts(num, true_totals, c, r)
    assert out["bleu"]["score"] == pytest.approx(expected, abs=TOL)


def test_zero_higher_order_matches_score_zero(mtgauge, tmp_path):
    # every third token replaced by an out-of-vocabulary word: unigram and bigram
    # matches exist, but no trigram or 4-gram can match.
    hyps, refs = make_bleu_corpus(seed=8, nseg=300, min_refs=1, max_refs=3)
    new_hyps = []
    for rs in refs:
        h = list(rs[0]) if len(rs[0]) >= 4 else list(rs[0]) + ["qqx"] * (4 - len(rs[0]))
        new_hyps.append([("qqx%d" % j) if j % 3 == 2 else t for j, t in enumerate(h)])
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in new_hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs])
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu"])
    num, den, c, r = nltk_corpus_stats(new_hyps, refs)
    assert num[0] > 0 and num[1] > 0 and num[2] == 0 and num[3] == 0
    bleu = out["bleu"]
    assert bleu["matched"] == num and bleu["candidates"] == den
    assert bleu["score"] == 0.0
    # NLTK 3.10.4 corpus_bleu gives ~1e-75 on the 0-100 scale here
    assert bleu["score"] == pytest.approx(nltk_corpus_bleu_100(refs, new_hyps), abs=TOL)


def test_all_empty_hypotheses(mtgauge, tmp_path):
    hyp = write_lines(tmp_path / "hyp.txt", ["", "", ""])
    ref = write_lines(tmp_path / "ref.txt", ["a b c d", "e f", "g"])
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu"])
    bleu = out["bleu"]
    assert out["segments"] == 3
    assert bleu["tokens"]["hypothesis"] == 0 and bleu["candidates"] == [0, 0, 0, 0] and bleu["matched"] == [0] * 4
    # NLTK 3.10.4 closest_ref_length with hyp_len 0 picks the shortest reference
    assert bleu["tokens"]["reference"] == 7
    assert bleu["brevity"] == 0  # contract: BP = 0 when c == 0 (as NLTK brevity_penalty)
    assert bleu["score"] == 0.0
    assert nltk_corpus_bleu_100([[["a", "b", "c", "d"]], [["e", "f"]], [["g"]]], [[], [], []]) == 0


def test_caseless_bleu(mtgauge, tmp_path):
    import random

    hyps, refs = make_bleu_corpus(seed=1234, nseg=800, min_refs=1, max_refs=3)
    rng = random.Random(1)

    def recase(tokens):
        out = []
        for t in tokens:
            x = rng.random()
            out.append(t.upper() if x < 0.2 else t.capitalize() if x < 0.4 else t)
        return out

    hyps_c = [recase(h) for h in hyps]
    refs_c = [[recase(r) for r in rs] for rs in refs]
    hyp = write_lines(tmp_path / "hyp.txt", [join(h) for h in hyps_c])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[join(r) for r in rs] for rs in refs_c])
    base = ["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace", "--metric", "bleu"]
    out_l = mtgauge.score_json(base + ["--caseless"])
    assert out_l["config"]["caseless"] is True
    low = lambda toks: join(toks).lower().split()  # Python str.lower()
    check_corpus_bleu(out_l, [low(h) for h in hyps_c], [[low(r) for r in rs] for rs in refs_c])
    out_c = mtgauge.score_json(base)
    check_corpus_bleu(out_c, hyps_c, refs_c)
    assert out_c["bleu"]["score"] < out_l["bleu"]["score"]


def test_hyp_from_stdin(mtgauge, tmp_path):
    hyps, refs = make_bleu_corpus(seed=66, nseg=400, min_refs=2, max_refs=2)
    hyp_text = "".join(join(h) + "\n" for h in hyps).encode("utf-8")
    r1 = write_lines(tmp_path / "ref1.txt", [join(rs[0]) for rs in refs])
    r2 = write_lines(tmp_path / "ref2.txt", [join(rs[1]) for rs in refs])
    out = mtgauge.score_json(["--ref", r1, "--ref", r2, "--hyp", "-", "--tokenizer", "whitespace",
                              "--metric", "bleu"], input_bytes=hyp_text)
    check_corpus_bleu(out, hyps, refs)


def test_irregular_whitespace_whitespace_tokenizer(mtgauge, tmp_path):
    # runs of spaces, tabs, leading/trailing blanks: whitespace tokenization must
    # give the same tokens as Python's str.split() on ASCII blanks.
    import random

    hyps, refs = make_bleu_corpus(seed=303, nseg=300, min_refs=1, max_refs=2)
    rng = random.Random(2)

    def messy(tokens):
        seps = [" ", "  ", "\t", " \t ", "   "]
        s = "".join(t + rng.choice(seps) for t in tokens)
        return rng.choice(["", " ", "\t"]) + s

    hyp = write_lines(tmp_path / "hyp.txt", [messy(h) for h in hyps])
    ref = write_refs_jsonl(tmp_path / "refs.jsonl", [[messy(r) for r in rs] for rs in refs])
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu"])
    check_corpus_bleu(out, hyps, refs)
