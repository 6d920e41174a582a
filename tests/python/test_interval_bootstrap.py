"""`mtgauge score --interval` against the classic bootstrap, and the coverage of its intervals.

mtgauge's intervals come from the Poisson bootstrap (Hanley & MacGibbon 2006; Chamandy et al.
2012): every segment gets an independent Poisson(1) weight per replicate. The outside reference
here is the classic bootstrap (Efron & Tibshirani 1993, "An Introduction to the Bootstrap",
percentile interval of ch. 13), resampling segments with replacement as Koehn 2004 does for
BLEU, written independently below with NumPy (only the per-segment statistics come from the
binary, through --per-segment; the resampling, the corpus scores and the quantiles are NumPy's).

All corpora are generated from invented syllables (tests/python/mtg_helpers.py); every random
draw is seeded, so each run computes the same numbers.
"""

import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from mtg_helpers import make_bleu_corpus, read_jsonl, write_lines, write_refs_jsonl

LEVEL = 0.95
ALPHA = (1 - LEVEL) / 2
# Standard normal quantile and density at 1 - ALPHA (Abramowitz & Stegun 1964, table 26.1,
# to the digits used here: z_0.975 = 1.959964).
Z = 1.959964
PHI_Z = math.exp(-Z * Z / 2) / math.sqrt(2 * math.pi)


# ---------------------------------------------------------------------------------------------
# the statistics and the scores, from per-segment output


def segment_matrix(seg_rows):
    """Per-segment statistics as a float matrix (exact: every value is an integer < 2^53).

    Columns: BLEU matched 1-4, candidates 1-4, hypothesis length, reference length; then chrF
    matched, candidates and reference per character order 1-6."""
    rows = []
    for s in seg_rows:
        b, c = s["bleu"], s["chrf"]["chars"]
        rows.append(b["matched"] + b["candidates"] + [b["tokens"]["hypothesis"], b["tokens"]["reference"]]
                    + c["matched"] + c["candidates"] + c["reference"])
    return np.asarray(rows, dtype=np.float64)


def bleu_of(sums):
    """Corpus BLEU (Papineni et al. 2002) of summed statistics, one row per replicate."""
    m, t, c, r = sums[:, 0:4], sums[:, 4:8], sums[:, 8], sums[:, 9]
    bp = np.where(c > r, 1.0, np.exp(1.0 - r / np.maximum(c, 1)))
    with np.errstate(divide="ignore"):
        logp = np.log(m / t).mean(axis=1)
    return 100.0 * bp * np.exp(logp)


def chrf_of(sums, beta=2.0):
    """Corpus chrF (Popović 2015), character orders 1-6, every order defined (corpora here
    have hypothesis and reference n-grams of every order)."""
    m, h, r = sums[:, 10:16], sums[:, 16:22], sums[:, 22:28]
    p, rc = (m / h).mean(axis=1), (m / r).mean(axis=1)
    b2 = beta * beta
    return 100.0 * (1 + b2) * p * rc / (b2 * p + rc)


def classic_bootstrap(x, replicates, seed):
    """Efron's bootstrap: `replicates` resamples of the n segments with replacement, as counts."""
    rng = np.random.default_rng(seed)
    n = x.shape[0]
    counts = rng.multinomial(n, np.full(n, 1.0 / n), size=replicates).astype(np.float64)
    return counts @ x


def score(mtgauge, tmp_path, hyps, refs, args, tag):
    r = write_refs_jsonl(tmp_path / f"{tag}.refs.jsonl", [[" ".join(t) for t in rs] for rs in refs])
    h = write_lines(tmp_path / f"{tag}.hyp.txt", [" ".join(t) for t in hyps])
    return mtgauge.score_json(["--ref", r, "--hyp", h, "--tokenizer", "whitespace", "--metric", "bleu", "--metric", "chrf", *args])


# ---------------------------------------------------------------------------------------------
# agreement with the classic bootstrap

ENGINE_R = 1000          # mtgauge's offline default (OFFLINE_RESAMPLES)
NUMPY_B = 2000           # classic bootstrap replicates


def quantile_se(sigma, replicates):
    """Monte-Carlo standard error of the ALPHA (or 1 - ALPHA) sample quantile of `replicates`
    draws from a distribution that is close to normal with sd `sigma`: the asymptotic variance
    of a sample quantile, p (1 - p) / (B f(q_p)^2) (e.g. Serfling 1980, Theorem 2.3.3), with the
    normal density f(q_p) = phi(z) / sigma."""
    return math.sqrt(ALPHA * (1 - ALPHA) / replicates) * sigma / PHI_Z


@pytest.mark.parametrize("seed,nseg", [(1201, 1000), (1202, 5000)])
def test_interval_agrees_with_the_classic_bootstrap(mtgauge, tmp_path, seed, nseg):
    hyps, refs = make_bleu_corpus(seed, nseg)
    out = score(mtgauge, tmp_path, hyps, refs, ["--interval", "--per-segment", tmp_path / "seg.jsonl"], "agree")
    assert out["config"]["interval"] == {"level": LEVEL, "resamples": ENGINE_R,
                                         "method": "poisson-bootstrap-percentile", "seed": 1}
    x = segment_matrix(read_jsonl(tmp_path / "seg.jsonl"))
    assert x.shape[0] == nseg
    total = x.sum(axis=0, keepdims=True)
    # The NumPy corpus scores of the binary's per-segment statistics are the binary's.
    assert bleu_of(total)[0] == pytest.approx(out["bleu"]["score"], abs=1e-9)
    assert chrf_of(total)[0] == pytest.approx(out["chrf"]["score"], abs=1e-9)

    sums = classic_bootstrap(x, NUMPY_B, seed)
    for metric, fn in [("bleu", bleu_of), ("chrf", chrf_of)]:
        reps = fn(sums)
        sigma = reps.std(ddof=1)
        low, high = np.percentile(reps, [100 * ALPHA, 100 * (1 - ALPHA)])
        got = out[metric]["interval"]
        # Tolerance. Both bounds estimate the same quantiles of the bootstrap distribution
        # (the Poisson and the classic bootstrap agree to first order, and exactly in the
        # limit, for scores that are smooth functions of ratios of sums, as BLEU and chrF are:
        # the random total weight of a Poisson replicate cancels in every ratio). What differs
        # is Monte-Carlo error: each side's quantile has the standard error of quantile_se, with
        # R = 1000 and B = 2000 draws, independent of each other, so the difference has sd
        # sqrt(se_R^2 + se_B^2) ~ 0.095 sigma. Allowed: 4 of those (a false alarm about 6e-5 per
        # bound under the normal approximation) plus one spacing of order statistics at R = 1000,
        # sigma / (R phi(z)) ~ 0.017 sigma, for the two quantile definitions (mtgauge: inverse
        # empirical CDF; NumPy: linear interpolation).
        tol = 4 * math.hypot(quantile_se(sigma, ENGINE_R), quantile_se(sigma, NUMPY_B)) + sigma / (ENGINE_R * PHI_Z)
        # The check has power: an interval off by a factor sqrt(2) in width (weights of variance
        # 2, say) moves each bound by 0.41 * 1.96 sigma = 0.81 sigma, twice the tolerance.
        assert tol < 0.45 * sigma
        print(f"{metric} n={nseg}: mtgauge {got['low']:.3f}..{got['high']:.3f}, classic {low:.3f}..{high:.3f}, "
              f"sigma {sigma:.3f}, tolerance {tol:.3f}")
        assert abs(got["low"] - low) < tol, (metric, got, low, high, sigma, tol)
        assert abs(got["high"] - high) < tol, (metric, got, low, high, sigma, tol)
        assert got["low"] < out[metric]["score"] < got["high"]


# ---------------------------------------------------------------------------------------------
# coverage

POPULATION = 10_000
TEST_SET = 300
TRIALS = 300
COVERAGE_R = 200         # the daemon's default (DAEMON_RESAMPLES), to keep the 300 runs short


def population(seed):
    """A large generated population of segments whose hypotheses are about 10% shorter than
    their references, so that the brevity penalty is active in every test set (corpus BLEU is
    then a smooth function of the sums; at c = r it has a kink, where any bootstrap is rougher)."""
    rng = np.random.default_rng(seed)
    hyps, refs = make_bleu_corpus(seed, POPULATION, min_refs=1, max_refs=2)
    short = []
    for h in hyps:
        k = len(h) - int(rng.binomial(len(h), 0.12))
        short.append(h[:max(k, 4)])
    return short, refs


def test_coverage_of_the_95_percent_interval(mtgauge, tmp_path):
    hyps, refs = population(1301)
    pop = score(mtgauge, tmp_path, hyps, refs, ["--per-segment", tmp_path / "pop.jsonl"], "pop")
    x = segment_matrix(read_jsonl(tmp_path / "pop.jsonl"))
    target = pop["bleu"]["score"]
    assert bleu_of(x.sum(axis=0, keepdims=True))[0] == pytest.approx(target, abs=1e-9)
    assert pop["bleu"]["tokens"]["ratio"] < 0.95

    rng = np.random.default_rng(1302)
    draws = [rng.integers(0, POPULATION, size=TEST_SET) for _ in range(TRIALS)]

    def trial(t):
        idx = draws[t]
        # Each test set is TEST_SET segments drawn independently and uniformly, with
        # replacement, from the population: the population's corpus BLEU is exactly the quantity
        # the interval estimates. Ids are renumbered 1..n (a segment drawn twice is two
        # segments), and each trial has its own seed, so the weights differ between trials.
        out = score(mtgauge, tmp_path, [hyps[i] for i in idx], [refs[i] for i in idx],
                    ["--interval", "--resamples", COVERAGE_R, "--seed", t + 1, "--threads", 1], f"t{t}")
        i = out["bleu"]["interval"]
        return i["low"] <= target <= i["high"], i["high"] - i["low"]

    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(trial, range(TRIALS)))
    covered = sum(c for c, _ in results)
    share = covered / TRIALS
    widths = [w for _, w in results]
    # Tolerance: `covered` is Binomial(TRIALS, p); if p = 0.95 its share has sd
    # sqrt(0.95 * 0.05 / 300) = 0.0126, and 3 sd (normal approximation to the binomial) allow
    # 0.912..0.988. What is approximate besides: the percentile interval is only asymptotically
    # exact (its coverage error shrinks with the test-set size; BLEU is nonlinear in the sums, so
    # small test sets have some bias), and R = 200 replicates estimate each bound with
    # Monte-Carlo error, which widens some intervals and narrows others.
    print(f"coverage {share:.3f} ({covered}/{TRIALS}), mean width {np.mean(widths):.2f}, population BLEU {target:.2f}")
    sd = math.sqrt(LEVEL * (1 - LEVEL) / TRIALS)
    assert abs(share - LEVEL) <= 3 * sd, f"coverage {share:.3f} ({covered}/{TRIALS}); mean width {np.mean(widths):.2f}"
    # Not trivially covered: the intervals are a few BLEU points wide, not the whole scale.
    assert 0.5 < float(np.mean(widths)) < 15.0, np.mean(widths)
