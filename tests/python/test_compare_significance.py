"""`mtgauge compare` against independent NumPy implementations of its two tests.

- The p-value: approximate randomization (Noreen 1989, "Computer-Intensive Methods for Testing
  Hypotheses", ch. 3; Riezler & Maxwell 2005 for MT metrics), written below with NumPy's own
  generator (numpy.random.default_rng, PCG64): each trial swaps the two systems' statistics of
  every segment with probability 1/2; p = (c + 1) / (trials + 1).
- The interval of the difference: the classic paired bootstrap (Koehn 2004; Efron & Tibshirani
  1993, percentile interval of ch. 13), resampling segments with replacement, the same resample
  for both systems; mtgauge instead reweights segments by paired Poisson(1) weights.

Only the per-segment statistics come from the binary (`score --per-segment` of each system); the
swaps, the resampling, the corpus scores (tests/python/test_interval_bootstrap.py's NumPy BLEU and
chrF) and the quantiles are NumPy's. Corpora are invented (tests/python/mtg_helpers.py); every
draw is seeded, so each run computes the same numbers.
"""

import json
import math
import random

import numpy as np
import pytest

from mtg_helpers import Zipf, invent_vocab, make_bleu_corpus, mutate, read_jsonl, resize, write_lines, write_refs_jsonl
from test_interval_bootstrap import ALPHA, LEVEL, PHI_Z, bleu_of, chrf_of, quantile_se, segment_matrix

METRICS = [("bleu", bleu_of), ("chrf", chrf_of)]
ENGINE_TRIALS = 10_000   # mtgauge's default (compare::DEFAULT_TRIALS)
NUMPY_TRIALS = 20_000
ENGINE_R = 1000          # mtgauge's default (resample::OFFLINE_RESAMPLES)
NUMPY_B = 2000
# mtgauge's TIE_TOLERANCE (src/metric/compare.rs): equal |differences| up to rounding are ties.
TIE = 1e-9


def two_systems(seed, nseg, rate, share_a, share_b):
    """References from make_bleu_corpus; systems A and B: its hypotheses with a share
    `share_a` (`share_b`) of the segments mutated at `rate` (words from another invented
    vocabulary), each segment for at most one of them: B slightly worse when share_b > share_a."""
    hyps, refs = make_bleu_corpus(seed, nseg)
    rng = random.Random(seed + 1)
    zipf = Zipf(rng, invent_vocab(rng, 350))
    a, b = [], []
    for h in hyps:
        x = rng.random()
        worse = mutate(rng, zipf, h, rate)
        worse = worse if len(worse) >= 4 else resize(rng, zipf, worse, 4)
        a.append(worse if x < share_a else list(h))
        b.append(worse if share_a <= x < share_a + share_b else list(h))
    return refs, a, b


def run_systems(mtgauge, tmp_path, refs, a, b, args):
    r = write_refs_jsonl(tmp_path / "refs.jsonl", [[" ".join(t) for t in rs] for rs in refs])
    files = [write_lines(tmp_path / f"{k}.txt", [" ".join(t) for t in hs]) for k, hs in (("a", a), ("b", b))]
    common = ["--ref", r, "--tokenizer", "whitespace", "--metric", "bleu", "--metric", "chrf"]
    mats = []
    for f in files:
        seg = tmp_path / f"{f.stem}.seg.jsonl"
        mtgauge.score_json([*common, "--hyp", f, "--per-segment", seg])
        mats.append(segment_matrix(read_jsonl(seg)))
    proc = mtgauge.run_ok(["compare", *common, "--hyp", files[0], "--hyp", files[1], "--json", *map(str, args)])
    return json.loads(proc.stdout), mats[0], mats[1]


def numpy_randomization(xa, xb, fn, trials, seed, chunk=2000):
    """c of approximate randomization: trials whose |fn(A') - fn(B')| >= the observed |fn(A) - fn(B)|."""
    rng = np.random.default_rng(seed)
    d = xa - xb
    sa, sb = xa.sum(axis=0), xb.sum(axis=0)
    observed = abs(fn(sa[None, :])[0] - fn(sb[None, :])[0])
    c = 0
    for start in range(0, trials, chunk):
        k = min(chunk, trials - start)
        swaps = rng.integers(0, 2, size=(k, xa.shape[0])).astype(np.float64)
        moved = swaps @ d          # exact: integers far below 2^53
        diff = fn(sa - moved) - fn(sb + moved)
        c += int(np.count_nonzero(np.abs(diff) >= observed - TIE))
    return c


# Corpora where the two systems are close, so that p is moderate (printed by pytest -s: 0.2-0.5).
@pytest.mark.parametrize("seed,nseg,share_a,share_b", [(2201, 400, 0.1, 0.11), (2202, 800, 0.05, 0.06)])
def test_p_value_agrees_with_numpy_randomization(mtgauge, tmp_path, seed, nseg, share_a, share_b):
    refs, a, b = two_systems(seed, nseg, 0.1, share_a, share_b)
    out, xa, xb = run_systems(mtgauge, tmp_path, refs, a, b, [])
    assert out["config"]["comparison"]["trials"] == ENGINE_TRIALS
    for metric, fn in METRICS:
        got = out[metric]
        # The NumPy corpus scores of the binary's per-segment statistics are the binary's.
        assert fn(xa.sum(axis=0, keepdims=True))[0] == pytest.approx(got["a"]["score"], abs=1e-9)
        assert fn(xb.sum(axis=0, keepdims=True))[0] == pytest.approx(got["b"]["score"], abs=1e-9)
        c2 = numpy_randomization(xa, xb, fn, NUMPY_TRIALS, seed)
        p1, p2 = got["p_value"], (c2 + 1) / (NUMPY_TRIALS + 1)
        assert p1 == pytest.approx((got["extreme_trials"] + 1) / (ENGINE_TRIALS + 1), rel=1e-12)
        # Tolerance. Both estimate the same p, the share of all 2^n swap patterns whose
        # |difference| reaches the observed one: c is Binomial(T, p) on either side, with
        # independent coins, so p1 - p2 has sd sqrt(p (1 - p) (1/T1 + 1/T2)) (p from the pooled
        # counts), and (c + 1) / (T + 1) has a bias below 1 / (T + 1) on either side. Allowed:
        # 4 sd (normal approximation to the binomial; a false alarm about 6e-5) plus 1 / (T1 + 1).
        p = (got["extreme_trials"] + c2) / (ENGINE_TRIALS + NUMPY_TRIALS)
        sd = math.sqrt(p * (1 - p) * (1 / ENGINE_TRIALS + 1 / NUMPY_TRIALS))
        tol = 4 * sd + 1 / (ENGINE_TRIALS + 1)
        print(f"{metric} n={nseg}: diff {got['difference']:+.3f}, mtgauge p {p1:.4f}, numpy p {p2:.4f}, tolerance {tol:.4f}")
        # The check has power: the corpora are made so that p is moderate, where a one-sided
        # count (p about halved) or a test that swaps nothing (p = 1 / (T + 1)) misses by more
        # than the tolerance.
        assert 0.02 < p2 < 0.7, f"{metric}: the corpus gives p {p2}, outside the range where the check has power"
        assert tol < 0.45 * p2
        assert abs(p1 - p2) < tol, (metric, p1, p2, tol)


def numpy_paired_bootstrap(xa, xb, fn, replicates, seed):
    """Per replicate fn(A*) - fn(B*), A* and B* the same resample of the segments."""
    rng = np.random.default_rng(seed)
    n = xa.shape[0]
    counts = rng.multinomial(n, np.full(n, 1.0 / n), size=replicates).astype(np.float64)
    return fn(counts @ xa) - fn(counts @ xb)


@pytest.mark.parametrize("seed,nseg", [(2301, 1500), (2302, 4000)])
def test_difference_interval_agrees_with_the_classic_paired_bootstrap(mtgauge, tmp_path, seed, nseg):
    refs, a, b = two_systems(seed, nseg, 0.2, 0.3, 0.4)
    out, xa, xb = run_systems(mtgauge, tmp_path, refs, a, b, ["--trials", 0])
    assert out["config"]["comparison"]["resamples"] == ENGINE_R
    assert out["config"]["comparison"]["level"] == LEVEL
    for metric, fn in METRICS:
        got = out[metric]
        d = numpy_paired_bootstrap(xa, xb, fn, NUMPY_B, seed)
        sigma = d.std(ddof=1)
        low, high = np.percentile(d, [100 * ALPHA, 100 * (1 - ALPHA)])
        # Tolerance, as in test_interval_bootstrap.py: both sides estimate the same quantiles
        # of the bootstrap distribution of the difference (Poisson and classic weights agree to
        # first order for smooth functions of ratios of sums); each bound carries the Monte-Carlo
        # error of a sample quantile (quantile_se, R = 1000 and B = 2000 independent draws), and
        # the quantile definitions differ by about one order-statistic spacing at R = 1000
        # (mtgauge: ranks ceil(a R) and R + 1 - ceil(a R); NumPy: linear interpolation).
        tol = 4 * math.hypot(quantile_se(sigma, ENGINE_R), quantile_se(sigma, NUMPY_B)) + sigma / (ENGINE_R * PHI_Z)
        # Power: pairing matters here. The unpaired sd (the two systems resampled
        # independently) is much larger than the paired one, so an interval that lost the
        # pairing would miss by far more than the tolerance; and a width off by sqrt(2) moves
        # each bound by 0.81 sigma, about twice the tolerance.
        unpaired = math.hypot(numpy_bootstrap_sd(xa, fn, seed + 7), numpy_bootstrap_sd(xb, fn, seed + 8))
        assert unpaired > 1.5 * sigma, (metric, unpaired, sigma)
        assert tol < 0.45 * sigma
        i = got["interval"]
        print(f"{metric} n={nseg}: diff {got['difference']:+.3f}, mtgauge {i['low']:+.3f}..{i['high']:+.3f}, "
              f"numpy {low:+.3f}..{high:+.3f}, sigma {sigma:.3f} (unpaired {unpaired:.3f}), tolerance {tol:.3f}")
        assert i["method"] == "paired-poisson-bootstrap-percentile"
        assert abs(i["low"] - low) < tol, (metric, i, low, high, sigma, tol)
        assert abs(i["high"] - high) < tol, (metric, i, low, high, sigma, tol)
        assert got["p_value"] is None


def numpy_bootstrap_sd(x, fn, seed, replicates=1000):
    """sd of one system's corpus score under the classic bootstrap."""
    rng = np.random.default_rng(seed)
    n = x.shape[0]
    counts = rng.multinomial(n, np.full(n, 1.0 / n), size=replicates).astype(np.float64)
    return fn(counts @ x).std(ddof=1)
