"""External segment metrics through a real `mtgauge serve`: `send --items` with "scores",
`send --create --external`, `status --json`.

Outside checks, each computed independently here from the values the test generated:
  * exactness: the fixed-point sums equal the Python `fractions.Fraction` computation of each
    value times 10^6 rounded half to even (Python's `round` of a Fraction rounds half to even;
    the value is the decimal numeral `repr` prints, as the daemon documents), and the mean equals
    the Fraction mean to within two ulps (the daemon divides two doubles);
  * the interval of the mean against a classic bootstrap (Efron 1979, "Bootstrap methods: another
    look at the jackknife"; percentile interval as in Efron & Tibshirani 1993, ch. 13) written
    with NumPy (version pinned in requirements.txt), within Monte-Carlo tolerance;
  * the same interval against the Student t interval (Student 1908, "The probable error of a
    mean") from the count, sum and sum of squares, for large n.

The values are generated from a seeded generator; nothing is copied from elsewhere.
"""

import json
import math
import queue
import random
import re
import signal
import subprocess
import threading
import time
from fractions import Fraction

import numpy as np
import pytest

from mtg_helpers import require_binary

LEVEL = 0.95
N_ITEMS = 2000
DAEMON_RESAMPLES = 1000
NUMPY_RESAMPLES = 4000
DECIMALS = 6
# Standard normal quantile at 0.975 (Abramowitz & Stegun 1964, table 26.1: 1.959964) and the
# density there.
Z = 1.959964
PHI_Z = math.exp(-Z * Z / 2) / math.sqrt(2 * math.pi)
LISTENING_RE = re.compile(r"listening grpc=(\S+) metrics=(\S+)")
SERVING_RE = re.compile(r"mtgauge::server: serving$")
STARTUP_TIMEOUT = 60.0


def t_quantile_975(nu):
    """Student t quantile at 0.975 with nu degrees of freedom from the normal quantile: the
    Cornish-Fisher expansion of Abramowitz & Stegun 1964, 26.7.5 (first three terms; the error
    is below 1e-7 for nu >= 1000)."""
    g1 = (Z**3 + Z) / 4
    g2 = (5 * Z**5 + 16 * Z**3 + 3 * Z) / 96
    g3 = (3 * Z**7 + 19 * Z**5 + 17 * Z**3 - 15 * Z) / 384
    return Z + g1 / nu + g2 / nu**2 + g3 / nu**3


class Server:
    def __init__(self, demo_dir, data_dir):
        cmd = [str(require_binary()), "serve", "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0",
               "--data-dir", str(data_dir), "--refset", f"ferry={demo_dir / 'refs.jsonl'}"]
        self.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        self.lines = queue.Queue()
        self.log = []
        threading.Thread(target=self._drain, daemon=True).start()
        self.url = None

    def _drain(self):
        for raw in self.proc.stderr:
            line = re.sub(r"\x1b\[[0-9;]*m", "", raw.decode("utf-8", "replace").rstrip("\n"))
            self.log.append(line)
            self.lines.put(line)
        self.lines.put(None)

    def wait_serving(self):
        deadline = time.monotonic() + STARTUP_TIMEOUT
        serving = False
        while self.url is None or not serving:
            left = deadline - time.monotonic()
            if left <= 0:
                pytest.fail("server did not start:\n" + "\n".join(self.log[-30:]), pytrace=False)
            try:
                line = self.lines.get(timeout=left)
            except queue.Empty:
                continue
            if line is None:
                pytest.fail("server exited:\n" + "\n".join(self.log[-30:]), pytrace=False)
            m = LISTENING_RE.search(line)
            if m:
                self.url = "http://" + m.group(1)
            serving = serving or SERVING_RE.search(line) is not None

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)


@pytest.fixture(scope="module")
def server(tmp_path_factory, mtgauge):
    d = tmp_path_factory.mktemp("external_demo")
    mtgauge.run_ok(["demo", "--offline", "--write-files", d])
    s = Server(d, tmp_path_factory.mktemp("external_data"))
    try:
        s.wait_serving()
        yield s
    finally:
        s.stop()


def generate_values(seed, n):
    """QE-like values on 0-1 with seven decimals (one more than kept: a tenth of them sit on a
    rounding half), skewed towards the top like a model's confidence."""
    rng = random.Random(seed)
    return [round(rng.betavariate(5, 2), 7) for _ in range(n)]


def fixed(v):
    """v x 10^6 rounded half to even, from the numeral `repr` prints."""
    return round(Fraction(repr(v)) * 10**DECIMALS)


def send_items(mtgauge, server, tmp_path, name, lines, session, create=True):
    path = tmp_path / name
    path.write_text("".join(json.dumps(x) + "\n" for x in lines), encoding="utf-8")
    args = ["send", "--server", server.url, "--session", session, "--items", path, "--json"]
    if create:
        args += ["--create", "--refset", "ferry", "--external", "qe:0:1", "--external", "edit_rate:0:100:better=lower:places=2",
                 "--resamples", DAEMON_RESAMPLES]
    return json.loads(mtgauge.run_ok(args).stdout)


def status(mtgauge, server, session):
    out = mtgauge.run_ok(["status", "--server", server.url, "--session", session, "--json"]).stdout
    return json.loads(out)


def test_mean_sums_and_interval_against_fractions_numpy_and_student(mtgauge, server, tmp_path):
    values = generate_values(18, N_ITEMS)
    lines = [{"key": f"call-{i}", "scores": {"qe": v}} for i, v in enumerate(values)]
    sent = send_items(mtgauge, server, tmp_path, "qe.jsonl", lines, "ferry-v8-qe")
    assert sent["rejected"] == 0 and sent["with_external_values"] == N_ITEMS, sent
    ext = {e["metric"]: e for e in status(mtgauge, server, "ferry-v8-qe")["external"]}
    qe = ext["qe"]
    assert qe["values"] == N_ITEMS and ext["edit_rate"]["values"] == 0
    assert qe["better"] == "higher" and ext["edit_rate"]["better"] == "lower"

    # Exactness (fractions.Fraction, Python standard library).
    ints = [fixed(v) for v in values]
    assert any(Fraction(repr(v)) * 10**DECIMALS % 1 == Fraction(1, 2) for v in values), "halves are exercised"
    assert int(qe["fixed_point"]["sum"]) == sum(ints)
    assert int(qe["fixed_point"]["squares"]) == sum(x * x for x in ints)
    exact_mean = Fraction(sum(ints), N_ITEMS * 10**DECIMALS)
    assert abs(qe["mean"] - float(exact_mean)) <= 2 * math.ulp(float(exact_mean))
    n = N_ITEMS
    exact_var = (Fraction(n * sum(x * x for x in ints) - sum(ints) ** 2, n * (n - 1))) / 10 ** (2 * DECIMALS)
    s = math.sqrt(exact_var)
    assert abs(qe["stddev"] - s) <= 1e-12 * s

    # Classic bootstrap with NumPy: resample the rounded values with replacement; percentile
    # interval with the inverse empirical CDF (Hyndman & Fan 1996, definition 1), as the daemon.
    x = np.asarray(ints, dtype=np.float64) / 10**DECIMALS
    rng = np.random.default_rng(18)
    means = x[rng.integers(0, n, size=(NUMPY_RESAMPLES, n))].mean(axis=1)
    a = (1 - LEVEL) / 2
    lo_np, hi_np = np.quantile(means, [a, 1 - a], method="inverted_cdf")
    iv = qe["interval"]
    assert iv["resamples"] == DAEMON_RESAMPLES and iv["level"] == LEVEL
    # Monte-Carlo standard deviation of a percentile endpoint of R replicates: SE x
    # sqrt(a (1 - a)) / (phi(z) sqrt(R)) (the asymptotic variance of a sample quantile); four
    # combined standard deviations (common practice).
    se = s / math.sqrt(n)
    mc = se * math.sqrt(a * (1 - a)) / PHI_Z * math.sqrt(1 / DAEMON_RESAMPLES + 1 / NUMPY_RESAMPLES)
    assert abs(iv["low"] - lo_np) <= 4 * mc, (iv, lo_np, mc)
    assert abs(iv["high"] - hi_np) <= 4 * mc, (iv, hi_np, mc)

    # Student t interval from the count, sum and sum of squares (n = 2000: the bootstrap's
    # skewness correction is of order 1/n, far below the Monte-Carlo tolerance).
    t = t_quantile_975(n - 1)
    mean = float(exact_mean)
    lo_t, hi_t = mean - t * se, mean + t * se
    mc_daemon = se * math.sqrt(a * (1 - a)) / PHI_Z / math.sqrt(DAEMON_RESAMPLES)
    assert abs(iv["low"] - lo_t) <= 4 * mc_daemon, (iv, lo_t)
    assert abs(iv["high"] - hi_t) <= 4 * mc_daemon, (iv, hi_t)


def test_bad_values_are_rejected_and_counted_nowhere(mtgauge, server, tmp_path):
    lines = [
        {"key": "a", "scores": {"qe": 0.5}},
        {"key": "b", "scores": {"qe": 1.25}},
        {"key": "c", "scores": {"qe": 0.5, "comet_like": 0.1}},
        {"key": "d", "scores": {"edit_rate": -1}},
    ]
    sent = send_items(mtgauge, server, tmp_path, "bad.jsonl", lines, "ferry-v8-bad")
    assert sent["rejected"] == 3 and sent["with_external_values"] == 1, sent
    ext = {e["metric"]: e for e in status(mtgauge, server, "ferry-v8-bad")["external"]}
    assert ext["qe"]["values"] == 1 and ext["qe"]["fixed_point"]["sum"] == "500000"
    assert ext["edit_rate"]["values"] == 0
    # A malformed line is refused by send itself, naming the file and line.
    proc = mtgauge.run(["send", "--server", server.url, "--session", "ferry-v8-bad", "--items", "-"],
                       input_bytes=b'{"key": "e", "scores": {"qe": "high"}}\n')
    assert proc.returncode == 2
    assert b"<stdin>:1:" in proc.stderr and b"scores.qe" in proc.stderr
