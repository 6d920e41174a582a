"""A fleet of two real `mtgauge serve` replicas, scraped by a real Prometheus that loads the rule
files of deploy/prometheus.

Everything runs as child processes on loopback, on ports picked by the OS (the replicas log their
bound addresses; Prometheus gets a port found free just before it starts). The data set is the
built-in, invented ferry-notice demo (`mtgauge demo --offline --write-files`). Half of a corpus
goes to each replica, from several producers at once; the fleet-wide BLEU and chrF that
Prometheus records from the summed counters must equal the offline `mtgauge score --json` of the
whole corpus. The alert rules of one config file, evaluated by a separate daemon that gets all
the data and rendered by `mtgauge rules` for this Prometheus over the two replicas, must agree on
which rules fire (a degraded session fires, a good one and one with as bad a score but thin
traffic do not); a stopped replica must fire the target-down alert.

Every expected number comes from the binary itself (offline scoring of the same files). No
outside scoring tool is used or imitated.

Outside facts used here, with their sources:
  * Prometheus HTTP API: GET /api/v1/query (instant query, result type "vector", each sample's
    "value" = [time, "string number"]), GET /api/v1/alerts (alerts with "labels" and "state"
    pending|firing), GET /api/v1/rules (groups, each rule with "health" and "lastError"),
    GET /api/v1/targets ("activeTargets" with "health" up|down), GET /-/ready: Prometheus
    documentation "HTTP API" and "Management API" (from memory), checked against the
    Prometheus 2.42.0 installed here (Debian package prometheus 2.42.0+ds).
  * Prometheus flags --config.file, --storage.tsdb.path, --web.listen-address and the
    configuration keys global.scrape_interval / scrape_timeout / evaluation_interval,
    rule_files, scrape_configs[].job_name / static_configs[].targets: Prometheus documentation
    "Configuration" (from memory), checked with `promtool check config` of the same version.
  * SIGTERM makes Prometheus shut down cleanly: Prometheus documentation (from memory).
"""

import json
import os
import queue
import re
import signal
import socket
import subprocess
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path

import pytest

from mtg_helpers import REPO, read_jsonl, require_binary, require_tool

PROM_DIR = REPO / "deploy" / "prometheus"
RULES = PROM_DIR / "mtgauge-rules.yml"
ALERTS = PROM_DIR / "mtgauge-alerts.yml"
INTERVAL_RULES = PROM_DIR / "mtgauge-interval-rules.yml"

# Alerts whose `for:` the test shortens (in a rewritten copy of mtgauge-alerts.yml; expressions,
# labels and annotations stay as in production) so that they can fire within the test.
FAST_FOR = {"MtgaugeTargetDown": "1s"}

# Time bounds. Scrapes and rule evaluations run every second.
STARTUP_TIMEOUT = 30.0
SHUTDOWN_TIMEOUT = 30.0  # the server's default --drain-seconds is 10
SEND_TIMEOUT = 120.0
PROM_TIMEOUT = 60.0
HTTP_TIMEOUT = 5.0
INTERVAL_S = 1  # scrape and evaluation interval of the test's Prometheus, seconds

# Agreement of the fleet score with the offline score (the brief's tolerance): the same integer
# sums go through the same formula in a different floating-point order.
SCORE_TOL = 1e-6

V7 = "model-v7"
DEGRADED = "fallback-dictionary"
SESSION_V7 = "fleet-v7"
PRODUCERS_PER_REPLICA = 3
WARMUP_LINES = 10
THIN_EXTRA_LINES = 40
# The alert agreement test: sessions, their label, and the rules' minimum of segments.
AGREE_V7 = "agree-v7"
AGREE_DEGRADED = "agree-fallback"
AGREE_THIN = "agree-thin"
AGREE_LABEL = "suite=agree"
AGREE_MIN_SEGMENTS = 200
AGREE_RESAMPLES = 100  # = the replicas' --exported-resamples default: the same replicates
AGREE_HOLD_S = 4.0  # seconds both evaluators must keep agreeing once they agree

LISTENING_RE = re.compile(r"listening grpc=(\S+) metrics=(\S+)")
SERVING_RE = re.compile(r"mtgauge::server: serving$")
ANSI_RE = re.compile(r"\x1b\[[0-9;]*m")

# Loopback HTTP only: never through a proxy from the environment.
_HTTP = urllib.request.build_opener(urllib.request.ProxyHandler({}))


def read_lines(path: Path):
    """Lines of a UTF-8 file split on '\\n' only (str.splitlines would split on U+2028 too)."""
    text = path.read_text(encoding="utf-8")
    parts = text.split("\n")
    assert parts[-1] == "", f"{path} does not end with a newline"
    return parts[:-1]


def write_lines(path: Path, lines):
    path.write_text("".join(line + "\n" for line in lines), encoding="utf-8", newline="\n")
    return path


def prometheus_binary() -> Path:
    return require_tool("prometheus", "PROMETHEUS_BIN", "this test")


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_until(what, fn, timeout):
    """Poll fn() every 0.25 s until it returns a true value; FAIL after `timeout` seconds."""
    deadline = time.monotonic() + timeout
    last = None
    while True:
        try:
            value = fn()
        except (urllib.error.URLError, ConnectionError, OSError) as exc:
            value, last = None, exc
        if value:
            return value
        if time.monotonic() > deadline:
            pytest.fail(f"{what}: not within {timeout} s (last error: {last})", pytrace=False)
        time.sleep(0.25)


def stop_process(proc, timeout=SHUTDOWN_TIMEOUT):
    """SIGTERM, wait; kill if it does not exit. Returns True if it exited on SIGTERM."""
    if proc.poll() is not None:
        return True
    proc.send_signal(signal.SIGTERM)
    try:
        proc.wait(timeout=timeout)
        return True
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=10)
        return False


# ---------------------------------------------------------------------------
# replicas


class Replica:
    def __init__(self, name, demo_dir, data_dir, extra=()):
        self.name = name
        # Each replica has its own durable store: the default --data-dir (/var/lib/mtgauge) is
        # shared by every server of the machine, and one store admits one `mtgauge serve`.
        data_dir.mkdir(parents=True, exist_ok=True)
        cmd = [str(require_binary()), "serve",
               "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0",
               "--data-dir", str(data_dir),
               "--refset", f"ferry={demo_dir / 'refs.jsonl'}", *map(str, extra)]
        self.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE)
        self.log_lines = []
        self._lines = queue.Queue()
        self._drainer = threading.Thread(target=self._drain, name=f"mtgauge-{name}-stderr",
                                         daemon=True)
        self._drainer.start()
        self.grpc_addr = self.metrics_addr = None
        self.stopped_by_test = False
        self.graceful = None

    def _drain(self):
        # Reads stderr until EOF for the whole life of the server, so the pipe never fills.
        for raw in self.proc.stderr:
            line = ANSI_RE.sub("", raw.decode("utf-8", "replace").rstrip("\n"))
            self.log_lines.append(line)
            self._lines.put(line)
        self._lines.put(None)

    def wait_listening(self):
        """Until the replica listens and has loaded its startup reference set ("serving": the
        addresses are logged before the startup sets load)."""
        deadline = time.monotonic() + STARTUP_TIMEOUT
        serving = False
        while self.grpc_addr is None or not serving:
            left = deadline - time.monotonic()
            if left <= 0:
                pytest.fail(f"replica {self.name}: no 'listening grpc=...' and 'serving' lines within "
                            f"{STARTUP_TIMEOUT} s:\n{self.log_tail()}", pytrace=False)
            try:
                line = self._lines.get(timeout=left)
            except queue.Empty:
                continue
            if line is None:
                self.proc.wait(timeout=10)
                pytest.fail(f"replica {self.name} exited with {self.proc.returncode} before "
                            f"serving:\n{self.log_tail()}", pytrace=False)
            m = LISTENING_RE.search(line)
            if m:
                self.grpc_addr, self.metrics_addr = m.group(1), m.group(2)
            serving = serving or SERVING_RE.search(line) is not None

    def stop(self):
        was_running = self.proc.poll() is None
        self.graceful = stop_process(self.proc)
        self._drainer.join(timeout=10)
        return was_running

    def log_tail(self, n=40):
        return "\n".join(self.log_lines[-n:])


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory, mtgauge) -> Path:
    d = tmp_path_factory.mktemp("fleet_demo")
    mtgauge.run_ok(["demo", "--offline", "--write-files", d])
    for name in ["refs.jsonl", f"hyp.{V7}.de.txt", f"hyp.{DEGRADED}.de.txt"]:
        assert (d / name).is_file(), f"`mtgauge demo --write-files` did not write {name}"
    return d


@pytest.fixture(scope="module")
def corpus(demo_dir):
    """ids of refs.jsonl and the hypothesis lines of the two systems, aligned with them."""
    ids = [row["id"] for row in read_jsonl(demo_dir / "refs.jsonl")]
    assert len(ids) == len(set(ids)) and len(ids) >= 100, "refs.jsonl: unexpected ids"
    hyps = {s: read_lines(demo_dir / f"hyp.{s}.de.txt") for s in (V7, DEGRADED)}
    for s, lines in hyps.items():
        assert len(lines) == len(ids), f"hyp.{s}.de.txt: {len(lines)} lines for {len(ids)} ids"
    return ids, hyps


@pytest.fixture(scope="module")
def offline(mtgauge, demo_dir):
    """`mtgauge score --json` of each whole corpus: the expected fleet numbers."""
    out = {}
    for system in (V7, DEGRADED):
        out[system] = mtgauge.score_json(["--ref", demo_dir / "refs.jsonl",
                                          "--hyp", demo_dir / f"hyp.{system}.de.txt",
                                          "--metric", "bleu", "--metric", "chrf"])
    return out


@pytest.fixture(scope="module")
def replicas(demo_dir, tmp_path_factory):
    stores = tmp_path_factory.mktemp("fleet_stores")
    reps = []
    try:
        for name in ("r0", "r1"):
            reps.append(Replica(name, demo_dir, stores / name))
        for r in reps:
            r.wait_listening()
    except BaseException:
        for r in reps:
            r.stop()
        raise
    yield reps
    problems = []
    for r in reps:
        was_running = r.stop()
        if not r.stopped_by_test and not was_running:
            problems.append(f"replica {r.name} died during the tests with {r.proc.returncode}:\n"
                            f"{r.log_tail()}")
        elif not r.graceful:
            problems.append(f"replica {r.name} ignored SIGTERM for {SHUTDOWN_TIMEOUT} s and was "
                            f"killed:\n{r.log_tail()}")
        elif r.proc.returncode != 0:
            problems.append(f"replica {r.name} exited {r.proc.returncode} after SIGTERM:\n"
                            f"{r.log_tail()}")
    assert not problems, "\n\n".join(problems)


# ---------------------------------------------------------------------------
# Prometheus


def fast_alerts_text(text: str) -> str:
    """mtgauge-alerts.yml with the `for:` of the FAST_FOR alerts replaced, all else unchanged."""
    for name, duration in FAST_FOR.items():
        pattern = re.compile(
            rf"(- alert: {name}\n(?:(?![ \t]*- (?:alert|record):).*\n)*?[ \t]+for: )(\S+)\n")
        text, n = pattern.subn(rf"\g<1>{duration}\n", text)
        assert n == 1, f"{ALERTS}: expected one `for:` line in alert {name}, replaced {n}"
    return text


class Prometheus:
    def __init__(self, proc, addr, log_path):
        self.proc = proc
        self.addr = addr
        self.log_path = log_path

    def log_tail(self, n=40):
        try:
            return "\n".join(self.log_path.read_text(errors="replace").split("\n")[-n:])
        except OSError as exc:
            return f"(no log: {exc})"

    def api(self, path, **params):
        url = f"http://{self.addr}{path}"
        if params:
            url += "?" + urllib.parse.urlencode(params)
        with _HTTP.open(url, timeout=HTTP_TIMEOUT) as resp:
            body = json.load(resp)
        assert body.get("status") == "success", f"{url}: {body}"
        return body["data"]

    def query(self, expr):
        """Instant query: list of (labels, float value)."""
        data = self.api("/api/v1/query", query=expr)
        assert data["resultType"] == "vector", data
        return [(s["metric"], float(s["value"][1])) for s in data["result"]]

    def scalar(self, expr):
        """The value of a query expected to return one sample, or None while it returns none."""
        res = self.query(expr)
        assert len(res) <= 1, f"{expr}: {len(res)} samples: {res}"
        return res[0][1] if res else None

    def alerts(self, name):
        return [a for a in self.api("/api/v1/alerts")["alerts"]
                if a["labels"].get("alertname") == name]


@pytest.fixture(scope="module")
def thresholds(offline):
    """BLEU and chrF thresholds of the agreement rules: halfway between the two systems' offline
    scores."""
    out = {}
    for metric in ("bleu", "chrf"):
        good, bad = offline[V7][metric]["score"], offline[DEGRADED][metric]["score"]
        assert bad + 10 < good, f"demo data changed: {DEGRADED} {metric} {bad}, {V7} {metric} {good}"
        out[metric] = (good + bad) / 2
    return out


# The rules both evaluators judge: (name, TOML body). Expected to fire: on the degraded session
# only (the good one is above the thresholds and not worse than itself; the thin one has too few
# segments).
AGREE_RULES = [
    ("agree-floor", 'labels = {{ suite = "agree" }}\nwindow = "all"\nwhen = "below"\nthreshold = {bleu}\n[alert.extra_labels]\nteam = "ferry-mt"'),
    ("agree-chrf-15m", 'labels = {{ suite = "agree" }}\nmetric = "chrf"\nwindow = "15m"\nwhen = "below"\nthreshold = {chrf}'),
    ("agree-worse", f'session = "{AGREE_DEGRADED}"\nwindow = "all"\nwhen = "drop"\nbaseline = "{AGREE_V7}"\npoints = 5'),
    ("agree-better", f'session = "{AGREE_V7}"\nwindow = "all"\nwhen = "drop"\nbaseline = "{AGREE_DEGRADED}"\npoints = 5'),
    # The dictionary fallback's outputs are out of the length band on 10 of the 300 notices
    # (`mtgauge score --source`; model-v7: none): the Wilson lower bound of 10/300 is 1.82%.
    ("agree-lengths", 'labels = {{ suite = "agree" }}\nwhen = "flag-rate"\nguard = "length"\nthreshold = 1'),
]
AGREE_EXPECTED = {("agree-floor", AGREE_DEGRADED), ("agree-chrf-15m", AGREE_DEGRADED), ("agree-worse", AGREE_DEGRADED),
                  ("agree-lengths", AGREE_DEGRADED)}


@pytest.fixture(scope="module")
def agreement_config(tmp_path_factory, thresholds):
    """The serve config with the agreement rules (for_seconds 1, evaluated every second)."""
    path = tmp_path_factory.mktemp("agree") / "mtgauge.toml"
    body = "alert_eval_seconds = 1\n"
    for name, rule in AGREE_RULES:
        text = rule.format(bleu=repr(thresholds["bleu"]), chrf=repr(thresholds["chrf"]))
        head, _, tail = text.partition("\n[alert.extra_labels]")
        body += (f'\n[[alert]]\nname = "{name}"\n{head}\nmin_segments = {AGREE_MIN_SEGMENTS}\n'
                 f'for_seconds = 1\n' + (f"[alert.extra_labels]{tail}\n" if tail else ""))
    path.write_text(body, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def judge(demo_dir, tmp_path_factory, agreement_config):
    """One more daemon, not scraped, that gets all the data and evaluates the rules itself."""
    r = Replica("judge", demo_dir, tmp_path_factory.mktemp("judge_store"), extra=["--config", agreement_config])
    try:
        r.wait_listening()
    except BaseException:
        r.stop()
        raise
    yield r
    was_running = r.stop()
    assert was_running and r.graceful and r.proc.returncode == 0, f"judge daemon:\n{r.log_tail()}"


@pytest.fixture(scope="module")
def prometheus(tmp_path_factory, replicas, agreement_config):
    binary = prometheus_binary()
    for f in (RULES, ALERTS, INTERVAL_RULES):
        assert f.is_file(), f"missing {f}"
    d = tmp_path_factory.mktemp("prometheus")
    alerts = d / "mtgauge-alerts.fast-for.yml"
    alerts.write_text(fast_alerts_text(ALERTS.read_text(encoding="utf-8")), encoding="utf-8")
    # The agreement rules, rendered from the judge's config file by the binary itself.
    rendered = d / "mtgauge-alert-rules.rendered.yml"
    proc = subprocess.run([str(require_binary()), "rules", "--config", str(agreement_config), "--output", str(rendered)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0 and f"{len(AGREE_RULES)} of {len(AGREE_RULES)} rules rendered" in proc.stderr, proc.stderr
    targets = ", ".join(json.dumps(r.metrics_addr) for r in replicas)
    rule_files = "".join(f"  - {json.dumps(str(p))}\n"
                         for p in (RULES, alerts, INTERVAL_RULES, rendered))
    config = d / "prometheus.yml"
    config.write_text(
        "global:\n"
        f"  scrape_interval: {INTERVAL_S}s\n"
        f"  scrape_timeout: {INTERVAL_S}s\n"
        f"  evaluation_interval: {INTERVAL_S}s\n"
        "rule_files:\n" + rule_files +
        "scrape_configs:\n"
        "  - job_name: mtgauge\n"
        "    static_configs:\n"
        f"      - targets: [{targets}]\n",
        encoding="utf-8")
    addr = f"127.0.0.1:{free_port()}"
    log_path = d / "prometheus.log"
    with open(log_path, "wb") as log:
        proc = subprocess.Popen(
            [str(binary), f"--config.file={config}", f"--storage.tsdb.path={d / 'data'}",
             f"--web.listen-address={addr}"],
            stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT, cwd=d)
    prom = Prometheus(proc, addr, log_path)

    def ready():
        if proc.poll() is not None:
            pytest.fail(f"prometheus exited with {proc.returncode}:\n{prom.log_tail()}",
                        pytrace=False)
        with _HTTP.open(f"http://{addr}/-/ready", timeout=HTTP_TIMEOUT) as resp:
            return resp.status == 200

    try:
        wait_until("prometheus ready", ready, STARTUP_TIMEOUT)
        wanted = {r.metrics_addr for r in replicas}

        def targets_up():
            active = prom.api("/api/v1/targets")["activeTargets"]
            return {t["labels"]["instance"] for t in active if t["health"] == "up"} >= wanted

        wait_until(f"both replicas scraped ({sorted(wanted)})", targets_up, PROM_TIMEOUT)
    except BaseException:
        stop_process(proc)
        raise
    yield prom
    was_running = proc.poll() is None
    graceful = stop_process(proc)
    assert was_running, f"prometheus died during the tests with {proc.returncode}:\n{prom.log_tail()}"
    assert graceful, f"prometheus ignored SIGTERM and was killed:\n{prom.log_tail()}"


# ---------------------------------------------------------------------------
# sending


def send_all(jobs, tmp: Path):
    """Run `mtgauge send` jobs concurrently: each (replica, session, producer, hyps, ids[,
    extra send arguments]).

    Returns the parsed --json acknowledgements, in job order; fails on any error.
    """
    binary = require_binary()
    procs = []
    for i, job in enumerate(jobs):
        replica, session, producer, hyps, ids = job[:5]
        extra = list(job[5]) if len(job) > 5 else []
        hyp_f = write_lines(tmp / f"{producer}.hyp.txt", hyps)
        ids_f = write_lines(tmp / f"{producer}.ids.txt", ids)
        out, err = open(tmp / f"{producer}.out", "wb"), open(tmp / f"{producer}.err", "wb")
        cmd = [str(binary), "send", "--server", f"http://{replica.grpc_addr}",
               "--session", session, "--create", "--refset", "ferry", "--metric", "bleu", "--metric", "chrf",
               "--hyp", str(hyp_f), "--ids", str(ids_f), "--producer", producer, "--json", *extra]
        procs.append((cmd, subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=out, stderr=err),
                      out, err, producer, len(hyps)))
    acks = []
    deadline = time.monotonic() + SEND_TIMEOUT
    try:
        for cmd, p, out, err, producer, n in procs:
            try:
                p.wait(timeout=max(1.0, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                pytest.fail(f"`{' '.join(cmd)}` did not finish within {SEND_TIMEOUT} s",
                            pytrace=False)
            out.close()
            err.close()
            stderr = (tmp / f"{producer}.err").read_text(errors="replace")
            assert p.returncode == 0, f"`{' '.join(cmd)}` exited {p.returncode}: {stderr[-2000:]}"
            ack = json.loads((tmp / f"{producer}.out").read_text())
            assert (ack["scored"], ack["unknown"], ack["rejected"], ack["duplicate_batches"]) == \
                (n, 0, 0, 0), f"producer {producer}: {ack}"
            acks.append(ack)
    finally:
        for _, p, out, err, _, _ in procs:
            if p.poll() is None:
                p.kill()
                p.wait(timeout=10)
            out.close()
            err.close()
    return acks


def chunks(seq, k):
    """k contiguous parts of seq, as equal as possible."""
    n = len(seq)
    return [seq[i * n // k:(i + 1) * n // k] for i in range(k)]


def one_value(prom, expr):
    return wait_until(f"a value for {expr}", lambda: prom.scalar(expr), PROM_TIMEOUT)


def wait_recorded_after(prom, names, selector):
    """Wait until every series `names{selector}` comes from a rule evaluation after this instant.
    Call it once every scrape Prometheus holds is complete: on a loaded machine a rule
    evaluation can lag the scrapes by seconds, so a fixed sleep is not enough."""
    now = prom.scalar("vector(time())")
    wait_until(f"{', '.join(names)} evaluated over the complete scrapes",
               lambda: all((prom.scalar(f"min(timestamp({name}{{{selector}}}))") or 0) > now for name in names),
               PROM_TIMEOUT)


# ---------------------------------------------------------------------------
# tests


def test_fleet_scores_equal_offline_score(replicas, prometheus, corpus, offline, tmp_path):
    ids, hyps = corpus
    lines = list(zip(ids, hyps[V7]))
    halves = chunks(lines, len(replicas))
    jobs = []
    for replica, half in zip(replicas, halves):
        for j, part in enumerate(chunks(half, PRODUCERS_PER_REPLICA)):
            jobs.append((replica, SESSION_V7, f"v7-{replica.name}-p{j + 1}",
                         [h for _, h in part], [i for i, _ in part]))
    send_all(jobs, tmp_path)

    sel = f'session="{SESSION_V7}"'
    n = len(ids)
    wait_until(f"{n} scored segments of {SESSION_V7} recorded",
               lambda: prometheus.scalar(
                   f'session_outcome:mtgauge_segments_total:sum{{{sel}, outcome="scored"}}') == n,
               PROM_TIMEOUT)
    # Both replicas contributed (each holds only its half).
    per_replica = prometheus.query(f'mtgauge_segments_total{{{sel}, outcome="scored"}}')
    assert sorted(v for _, v in per_replica) == sorted(float(len(h)) for h in halves), per_replica

    # The summed raw counters are exactly the offline statistics of the whole corpus.
    bleu, chrf = offline[V7]["bleu"], offline[V7]["chrf"]
    for k, (m, t) in enumerate(zip(bleu["matched"], bleu["candidates"]), start=1):
        assert prometheus.scalar(f'sum(mtgauge_bleu_matches_total{{{sel}, order="{k}"}})') == m
        assert prometheus.scalar(f'sum(mtgauge_bleu_ngrams_total{{{sel}, order="{k}"}})') == t
    assert prometheus.scalar(f"sum(mtgauge_hypothesis_tokens_total{{{sel}}})") == bleu["tokens"]["hypothesis"]
    assert prometheus.scalar(f"sum(mtgauge_reference_tokens_total{{{sel}}})") == bleu["tokens"]["reference"]
    for name, key in [("matches", "matched"), ("hypothesis_ngrams", "candidates"),
                      ("reference_ngrams", "reference")]:
        for k, expected in enumerate(chrf["chars"][key], start=1):
            got = prometheus.scalar(f'sum(mtgauge_chrf_{name}_total{{{sel}, metric="chrf", '
                                    f'kind="chars", order="{k}"}})')
            assert got == expected, f"chrF {name} order {k}: {got} != {expected}"
    # the chrF counters' kind label is "chars" (and "words"): no series keeps the old "char"
    old_kind = prometheus.query(f'mtgauge_chrf_matches_total{{{sel}, kind="char"}}')
    assert old_kind == [], old_kind
    # Every replica describes the session's configuration in one line, the same on each:
    # bleu and chrf with their defaults under the default tokenizer.
    info = prometheus.query(f"mtgauge_session_info{{{sel}}}")
    assert len(info) == len(replicas), info
    assert {labels.get("config") for labels, _ in info} == {
        "tokenizer=nist caseless=no bleu:order=4,ref-length=closest,smoothing=epsilon,epsilon=0.1 "
        "chrf:chars=6,words=0,beta=2"}, info

    # Let the rule groups evaluate again on the complete counts, then compare the scores.
    wait_recorded_after(prometheus, ["session:mtgauge_bleu:sum", "session_metric:mtgauge_chrf:sum",
                                     "session:mtgauge_bleu_brevity_penalty:sum", "session_metric:mtgauge_chrf_precision:sum",
                                     "session_metric:mtgauge_chrf_recall:sum"], sel)
    fleet_bleu = one_value(prometheus, f"session:mtgauge_bleu:sum{{{sel}}}")
    fleet_chrf = one_value(prometheus, f'session_metric:mtgauge_chrf:sum{{{sel}, metric="chrf"}}')
    print(f"\nfleet BLEU {fleet_bleu!r} vs offline {bleu['score']!r}; "
          f"fleet chrF {fleet_chrf!r} vs offline {chrf['score']!r}")
    assert abs(fleet_bleu - bleu["score"]) <= SCORE_TOL, (fleet_bleu, bleu["score"])
    assert abs(fleet_chrf - chrf["score"]) <= SCORE_TOL, (fleet_chrf, chrf["score"])
    bp = one_value(prometheus, f"session:mtgauge_bleu_brevity_penalty:sum{{{sel}}}")
    assert abs(bp - bleu["brevity"]) <= 1e-12, (bp, bleu["brevity"])
    p = one_value(prometheus, f'session_metric:mtgauge_chrf_precision:sum{{{sel}, metric="chrf"}}')
    r = one_value(prometheus, f'session_metric:mtgauge_chrf_recall:sum{{{sel}, metric="chrf"}}')
    assert abs(100 * p - chrf["precision"]) <= SCORE_TOL and abs(100 * r - chrf["recall"]) <= SCORE_TOL

    # Not asserted, for the record: the 15-minute window of this session, sent without a warm-up,
    # misses each replica's first batch (see mtgauge-rules.yml, "Windows").
    w15 = prometheus.query(f"session:mtgauge_bleu:increase15m{{{sel}}}")
    s15 = prometheus.query(f'session_outcome:mtgauge_segments:increase15m{{{sel}, outcome="scored"}}')
    print(f"15m window of {SESSION_V7}: BLEU {w15 and w15[0][1]}, scored {s15 and s15[0][1]}")

    # Each replica's own score is that of its half only: not the fleet's.
    own = prometheus.query(f'mtgauge_score{{{sel}, metric="bleu", window="cumulative"}}')
    assert len(own) == len(replicas), own
    print("replicas' own cumulative BLEU: " + ", ".join(f"{v:.4f}" for _, v in own))

    # Every rule of every loaded group evaluates without error on real data.
    bad = [(g["name"], r.get("name"), r.get("lastError"))
           for g in prometheus.api("/api/v1/rules")["groups"] for r in g["rules"]
           if r.get("health") == "err" or r.get("lastError")]
    assert not bad, f"rules with evaluation errors: {bad}"


def daemon_firing(judge, sessions):
    """{(rule, session)} the judge daemon reports firing, and its alerts by pair."""
    firing, seen = set(), {}
    for session in sessions:
        proc = subprocess.run([str(require_binary()), "status", "--server", f"http://{judge.grpc_addr}",
                               "--session", session, "--json"], capture_output=True, text=True, timeout=60)
        assert proc.returncode == 0, proc.stderr
        for a in json.loads(proc.stdout)["alerts"]:
            seen[(a["rule"], session)] = a
            if a["state"] == "firing":
                firing.add((a["rule"], session))
    return firing, seen


def prometheus_firing(prom):
    """{(alertname, session)} of the agreement rules firing in Prometheus, and the alerts."""
    names = {name for name, _ in AGREE_RULES}
    alerts = [a for a in prom.api("/api/v1/alerts")["alerts"] if a["labels"].get("alertname") in names]
    firing = {(a["labels"]["alertname"], a["labels"]["session"]): a for a in alerts if a["state"] == "firing"}
    return set(firing), firing


def test_daemon_and_prometheus_agree_on_alerts(replicas, prometheus, judge, corpus, offline, thresholds, tmp_path):
    """The same rules, the same data: one daemon evaluating them itself, and Prometheus
    evaluating the rules `mtgauge rules` renders over two replicas that each got part of the
    data. Both must fire exactly AGREE_EXPECTED, with the same labels."""
    ids, hyps = corpus
    good, bad = list(zip(ids, hyps[V7])), list(zip(ids, hyps[DEGRADED]))
    thin = bad[:WARMUP_LINES * len(replicas) + THIN_EXTRA_LINES]
    assert len(thin) < AGREE_MIN_SEGMENTS
    extra = ["--label", AGREE_LABEL, "--resamples", str(AGREE_RESAMPLES)]
    sessions = {AGREE_V7: good, AGREE_DEGRADED: bad, AGREE_THIN: thin}
    warm_n = WARMUP_LINES * len(replicas)

    def jobs(part):
        out = []
        for session, lines in sessions.items():
            chosen = lines[:warm_n] if part == "warm" else lines[warm_n:]
            if not chosen:
                continue
            for rep, half in zip(replicas, chunks(chosen, len(replicas))):
                out.append((rep, session, f"{part}-{session}-{rep.name}", [h for _, h in half], [i for i, _ in half], extra))
            out.append((judge, session, f"{part}-{session}-judge", [h for _, h in chosen], [i for i, _ in chosen], extra))
        return out

    # Warm-up first, so that every counter series exists (and is scraped) before the traffic a
    # 15-minute window must see: increase() cannot see the counts a series is first exported with.
    send_all(jobs("warm"), tmp_path)
    for session in sessions:
        wait_until(f"replicate counters of {session} scraped from both replicas",
                   lambda s=session: prometheus.scalar(
                       f'count(mtgauge_replicate_segments_total{{session="{s}", replicate="0"}})') == len(replicas),
                   PROM_TIMEOUT)
    time.sleep(2 * INTERVAL_S)
    send_all(jobs("rest"), tmp_path)

    def agree():
        d, _ = daemon_firing(judge, sessions)
        p, _ = prometheus_firing(prometheus)
        return d == p == AGREE_EXPECTED

    try:
        wait_until("the daemon and Prometheus both firing exactly the expected alerts", agree, PROM_TIMEOUT)
    except BaseException:
        print("daemon:", daemon_firing(judge, sessions)[0], "\nprometheus:", prometheus_firing(prometheus)[0])
        raise
    # They keep agreeing (nothing else starts firing on either side).
    deadline = time.monotonic() + AGREE_HOLD_S
    while time.monotonic() < deadline:
        d, seen = daemon_firing(judge, sessions)
        p, palerts = prometheus_firing(prometheus)
        assert d == p == AGREE_EXPECTED, (d, p)
        time.sleep(0.5)
    # The thin session was judged by the daemon and had too few segments.
    for rule in ("agree-floor", "agree-chrf-15m"):
        a = seen[(rule, AGREE_THIN)]
        assert a["state"] == "inactive" and a["segments"] == len(thin), a
    # The same labels on both sides: the daemon's (alertname, session, severity, metric, extra
    # labels), so that Alertmanager sees one alert.
    assert palerts[("agree-floor", AGREE_DEGRADED)]["labels"] == {
        "alertname": "agree-floor", "session": AGREE_DEGRADED, "severity": "warning", "metric": "bleu", "team": "ferry-mt"}
    assert palerts[("agree-chrf-15m", AGREE_DEGRADED)]["labels"]["metric"] == "chrf"
    assert "proxy" in palerts[("agree-floor", AGREE_DEGRADED)]["annotations"]["description"]
    # The bounds judged: over `all`, the replicas' replicate sums add up to the judge's exactly;
    # PromQL's quantile interpolates between the replicate scores at ranks 97 and 98 (1-based),
    # the daemon takes rank 98: Prometheus' bound is at most the daemon's.
    bounds = {m["rule"]: v for m, v in prometheus.query(f'session_rule:mtgauge_alert_bound:quantile{{session="{AGREE_DEGRADED}"}}')}
    for rule, _ in AGREE_RULES[:3]:
        own = seen[(rule, AGREE_DEGRADED)]
        print(f"\n{rule}: daemon value {own['value']:.4f}, upper bound {own['high']:.4f} over {own['segments']} segments; "
              f"Prometheus upper bound {bounds[rule]:.4f}")
    for rule in ("agree-floor", "agree-worse"):
        own = seen[(rule, AGREE_DEGRADED)]["high"]
        assert bounds[rule] <= own + 1e-9 and own - bounds[rule] < 1.0, (rule, bounds[rule], own)
    assert seen[("agree-floor", AGREE_DEGRADED)]["segments"] == len(bad)
    assert thresholds["bleu"] > seen[("agree-floor", AGREE_DEGRADED)]["high"]
    # flag-rate: the same summed guard counts and Wilson's formula on both sides: equal bounds
    # (the daemon's `low`, in percent), and the guard in the `metric` label.
    own = seen[("agree-lengths", AGREE_DEGRADED)]
    print(f"agree-lengths: daemon {own['value']:.4f}% flagged, Wilson lower bound {own['low']:.6f} over {own['segments']} "
          f"decided items; Prometheus bound {bounds['agree-lengths']:.6f}")
    assert own["segments"] == len(bad) and abs(bounds["agree-lengths"] - own["low"]) < 1e-9, (bounds["agree-lengths"], own)
    assert palerts[("agree-lengths", AGREE_DEGRADED)]["labels"]["metric"] == "guard:length"
    assert seen[("agree-lengths", AGREE_V7)]["state"] == "inactive" and seen[("agree-lengths", AGREE_V7)]["value"] == 0


SESSION_IV = "fleet-interval"
SESSION_IV_ONE = "fleet-interval-one"
# Replicates of the interval sessions: the server's default --exported-resamples (100), so that
# the daemon's own interval and Prometheus' use the same replicates.
IV_RESAMPLES = 100
REPLICATE_FAMILIES = {
    "mtgauge_replicate_segments_total": (),
    "mtgauge_replicate_bleu_matches_total": ("order",),
    "mtgauge_replicate_bleu_ngrams_total": ("order",),
    "mtgauge_replicate_hypothesis_tokens_total": (),
    "mtgauge_replicate_reference_tokens_total": (),
    "mtgauge_replicate_chrf_matches_total": ("metric", "kind", "order"),
    "mtgauge_replicate_chrf_hypothesis_ngrams_total": ("metric", "kind", "order"),
    "mtgauge_replicate_chrf_reference_ngrams_total": ("metric", "kind", "order"),
}


def promql_quantile(values, q):
    """PromQL's quantile(q, v): rank q (N - 1) over the sorted values, 0-based, interpolated
    linearly between its neighbours (Prometheus documentation, "Aggregation operators", and its
    promql/quantile.go; from memory; the agreement below checks it)."""
    v = sorted(values)
    rank = q * (len(v) - 1)
    lo = int(rank)
    hi = min(lo + 1, len(v) - 1)
    return v[lo] + (rank - lo) * (v[hi] - v[lo])


def test_fleet_interval_equals_one_process(replicas, prometheus, corpus, tmp_path):
    """Half of the corpus on each replica vs the whole corpus in one process: the per-replicate
    counters summed over the replicas equal the one process's exactly, and so do the intervals
    that the rules of mtgauge-interval-rules.yml derive from them. The daemon's own interval
    picks the replicate at rank ceil(q N); PromQL's quantile interpolates: both are checked
    against the replicate scores Prometheus recorded."""
    ids, hyps = corpus
    lines = list(zip(ids, hyps[V7]))
    extra = ["--resamples", str(IV_RESAMPLES)]
    jobs = [(replica, SESSION_IV, f"iv-{replica.name}", [h for _, h in half], [i for i, _ in half], extra)
            for replica, half in zip(replicas, chunks(lines, len(replicas)))]
    jobs.append((replicas[0], SESSION_IV_ONE, "iv-one", [h for _, h in lines], [i for i, _ in lines], extra))
    send_all(jobs, tmp_path)
    n = len(ids)
    for session in (SESSION_IV, SESSION_IV_ONE):
        wait_until(f"{n} scored segments of {session} in the replicate counters",
                   lambda: prometheus.scalar(f'sum(mtgauge_replicate_segments_total{{session="{session}", '
                                             f'replicate="0"}}) and on () '
                                             f'sum(session_outcome:mtgauge_segments_total:sum{{session="{session}", '
                                             f'outcome="scored"}}) == {n}') is not None,
                   PROM_TIMEOUT)
    wait_recorded_after(prometheus, ["session:mtgauge_bleu_interval_low:sum", "session:mtgauge_bleu_interval_high:sum",
                                     "session_metric:mtgauge_chrf_interval_low:sum", "session_metric:mtgauge_chrf_interval_high:sum",
                                     "session_replicate:mtgauge_bleu:sum", "session_metric_replicate:mtgauge_chrf:sum"],
                        f'session=~"{SESSION_IV}|{SESSION_IV_ONE}"')

    # Replicate sums: the fleet's equal the one process's, series by series.
    for family, labels in REPLICATE_FAMILIES.items():
        by = ", ".join(("replicate",) + labels)
        fleet = {tuple(m.get(k) for k in ("replicate",) + labels): v
                 for m, v in prometheus.query(f'sum by ({by}) ({family}{{session="{SESSION_IV}"}})')}
        one = {tuple(m.get(k) for k in ("replicate",) + labels): v
               for m, v in prometheus.query(f'sum by ({by}) ({family}{{session="{SESSION_IV_ONE}"}})')}
        assert len({k[0] for k in one}) == IV_RESAMPLES, (family, len(one))
        assert fleet == one, f"{family}: the replicas' sums differ from the one process's"

    # Intervals from Prometheus: fleet and one process alike.
    bounds = {}
    for session in (SESSION_IV, SESSION_IV_ONE):
        sel = f'session="{session}"'
        bounds[session] = (one_value(prometheus, f"session:mtgauge_bleu_interval_low:sum{{{sel}}}"),
                           one_value(prometheus, f"session:mtgauge_bleu_interval_high:sum{{{sel}}}"),
                           one_value(prometheus, f'session_metric:mtgauge_chrf_interval_low:sum{{{sel}, metric="chrf"}}'),
                           one_value(prometheus, f'session_metric:mtgauge_chrf_interval_high:sum{{{sel}, metric="chrf"}}'))
    for a, b in zip(bounds[SESSION_IV], bounds[SESSION_IV_ONE]):
        assert abs(a - b) <= 1e-9, (bounds)

    # The replicate scores Prometheus recorded, and the daemon's own interval of the one process.
    bleu_reps = [v for _, v in prometheus.query(f'session_replicate:mtgauge_bleu:sum{{session="{SESSION_IV_ONE}"}}')]
    chrf_reps = [v for _, v in prometheus.query(f'session_metric_replicate:mtgauge_chrf:sum{{session="{SESSION_IV_ONE}", metric="chrf"}}')]
    assert len(bleu_reps) == len(chrf_reps) == IV_RESAMPLES
    status = subprocess.run([str(require_binary()), "status", "--server", f"http://{replicas[0].grpc_addr}",
                             "--session", SESSION_IV_ONE, "--json"], capture_output=True, text=True, timeout=60)
    assert status.returncode == 0, status.stderr
    cum = json.loads(status.stdout)["cumulative"]
    own = {"bleu": cum["bleu"]["interval"], "chrf": cum["chrf"]["interval"]}
    assert own["bleu"]["resamples"] == IV_RESAMPLES and own["bleu"]["level"] == 0.95
    for metric, reps, (low, high) in [("bleu", bleu_reps, bounds[SESSION_IV][:2]), ("chrf", chrf_reps, bounds[SESSION_IV][2:])]:
        v = sorted(reps)
        # mtgauge: x_(ceil(q N)), 1-based (src/metric/resample.rs); N = 100: x_(3) and x_(98).
        assert abs(own[metric]["low"] - v[2]) <= 1e-9 and abs(own[metric]["high"] - v[97]) <= 1e-9, (metric, own[metric], v[:4], v[-4:])
        # PromQL: interpolated at rank 0.025 x 99 = 2.475 and 0.975 x 99 = 96.525 (0-based).
        assert abs(low - promql_quantile(v, 0.025)) <= 1e-9 and abs(high - promql_quantile(v, 0.975)) <= 1e-9
        # Hence the two differ by at most the gap between neighbouring replicate scores.
        assert v[2] <= low <= v[3] and v[96] <= high <= v[97]
        print(f"\n{metric}: fleet interval from Prometheus [{low:.4f}, {high:.4f}] (interpolated); "
              f"one process, mtgauge's own [{own[metric]['low']:.4f}, {own[metric]['high']:.4f}] (rank ceil(qN))")


def test_stopped_replica_fires_target_down(replicas, prometheus):
    victim, survivor = replicas[-1], replicas[0]
    victim.stopped_by_test = True
    assert victim.stop(), f"replica {victim.name} was not running:\n{victim.log_tail()}"
    assert victim.graceful and victim.proc.returncode == 0, (
        f"replica {victim.name} did not exit 0 on SIGTERM ({victim.proc.returncode}):\n"
        f"{victim.log_tail()}")

    def firing():
        return [a for a in prometheus.alerts("MtgaugeTargetDown")
                if a["labels"].get("instance") == victim.metrics_addr and a["state"] == "firing"]

    alert = wait_until(f"MtgaugeTargetDown firing for {victim.metrics_addr}", firing,
                       PROM_TIMEOUT)[0]
    assert alert["labels"]["job"] == "mtgauge"
    assert "proxies" in alert["annotations"]["description"]
    others = [a for a in prometheus.alerts("MtgaugeTargetDown")
              if a["labels"].get("instance") == survivor.metrics_addr]
    assert not others, others

