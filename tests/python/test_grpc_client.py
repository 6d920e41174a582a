"""The gRPC API driven by a REAL generated Python client against the real server binary.

The client stubs are generated at test time from <repo>/proto by grpcio-tools (pinned in
requirements.txt), so the test breaks if the .proto files and the server disagree. The server
is `mtgauge serve` as a child process on ports picked by the OS, loaded with the files that
`mtgauge demo --write-files` writes (the built-in, invented ferry-notice data set).

Every expected number comes from the binary itself (the offline `mtgauge score --json` of the
same files), except in the session with a non-default BLEU epsilon, whose sentence scores are
also compared with NLTK 3.10.4 (nltk.translate.bleu_score.sentence_bleu with
SmoothingFunction(epsilon=...).method1) on an invented corpus. No outside scoring tool is used or
imitated.

Outside facts used here, with their sources:
  * grpc.health.v1 Health/Check and its SERVING status: the gRPC health checking protocol
    (grpc/grpc doc/health-checking.md), client from grpcio-health-checking 1.85.1.
  * grpc.reflection.v1alpha ServerReflection: client from grpcio-reflection 1.85.1.
  * grpc.reflection.v1 ServerReflection has the same messages as v1alpha under another
    package name, so the v1alpha message classes encode and decode v1 on the wire
    (from memory: grpc/grpc src/proto/grpc/reflection/v1/reflection.proto).
  * Status codes NOT_FOUND, INVALID_ARGUMENT, PERMISSION_DENIED: grpc.StatusCode of
    grpcio 1.85.3 (the gRPC status code list, grpc/grpc doc/statuscodes.md).
"""

import importlib
import json
import queue
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import grpc
import pytest
from nltk.translate.bleu_score import SmoothingFunction, modified_precision, sentence_bleu
from google.protobuf import descriptor_pool
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc
from grpc_reflection.v1alpha.proto_reflection_descriptor_database import (
    ProtoReflectionDescriptorDatabase,
)

from mtg_helpers import (REPO, make_bleu_corpus, read_jsonl, require_binary, write_lines,
                         write_refs_jsonl)

PROTO_ROOT = REPO / "proto"
PROTO_FILES = ["common.proto", "refsets.proto", "sessions.proto", "scoring.proto"]

# Bounds on time: every RPC carries a deadline, every process wait a timeout.
RPC_TIMEOUT = 15.0
STREAM_TIMEOUT = 120.0
STARTUP_TIMEOUT = 30.0
SHUTDOWN_TIMEOUT = 30.0  # the server's default --drain-seconds is 10
HEALTH_DEADLINE = 20.0

# Producer affinity (README, "Producer affinity"): the fleet this test's server says it is in.
AFFINITY_FLEET = ["py-0", "py-1"]

BATCH_SIZE = 37
V7_SESSION = "py-v7"
V7_PRODUCER = "py-1"
METRICS = ["bleu", "chrf", "chrf++"]
SYSTEMS = ["model-v8-rc", "model-v7", "fallback-dictionary"]

LISTENING_RE = re.compile(r"listening grpc=(\S+) metrics=(\S+)")
ANSI_RE = re.compile(r"\x1b\[[0-9;]*m")


def read_lines(path: Path):
    """Lines of a UTF-8 file split on '\\n' only (str.splitlines would split on U+2028 too)."""
    text = path.read_text(encoding="utf-8")
    parts = text.split("\n")
    assert parts[-1] == "", f"{path} does not end with a newline"
    return parts[:-1]


def batches_of(items, size):
    return [items[i:i + size] for i in range(0, len(items), size)]


# ---------------------------------------------------------------------------
# fixtures: stubs, demo files, server, channel


class Stubs:
    """The generated modules of mtgauge.v1."""

    def __init__(self, out_dir: Path):
        self.out_dir = out_dir
        self.common = importlib.import_module("mtgauge.v1.common_pb2")
        self.refsets = importlib.import_module("mtgauge.v1.refsets_pb2")
        self.refsets_grpc = importlib.import_module("mtgauge.v1.refsets_pb2_grpc")
        self.sessions = importlib.import_module("mtgauge.v1.sessions_pb2")
        self.sessions_grpc = importlib.import_module("mtgauge.v1.sessions_pb2_grpc")
        self.scoring = importlib.import_module("mtgauge.v1.scoring_pb2")
        self.scoring_grpc = importlib.import_module("mtgauge.v1.scoring_pb2_grpc")


@pytest.fixture(scope="session")
def stubs(tmp_path_factory) -> Stubs:
    out = tmp_path_factory.mktemp("grpc_stubs")
    protos = [f"mtgauge/v1/{name}" for name in PROTO_FILES]
    for p in protos:
        assert (PROTO_ROOT / p).is_file(), f"missing {PROTO_ROOT / p}"
    proc = subprocess.run(
        [sys.executable, "-m", "grpc_tools.protoc", f"-I{PROTO_ROOT}",
         f"--python_out={out}", f"--grpc_python_out={out}", *protos],
        capture_output=True, timeout=120,
    )
    assert proc.returncode == 0, (
        f"grpc_tools.protoc exited {proc.returncode}: {proc.stderr.decode('utf-8', 'replace')}"
    )
    for p in protos:
        stem = Path(p).with_suffix("")
        assert (out / f"{stem}_pb2.py").is_file(), f"protoc did not write {stem}_pb2.py"
    assert "mtgauge" not in sys.modules, "a module named mtgauge was imported before the stubs"
    sys.path.insert(0, str(out))
    return Stubs(out)


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory, mtgauge) -> Path:
    d = tmp_path_factory.mktemp("demo")
    mtgauge.run_ok(["demo", "--offline", "--write-files", d])
    expected = ["source.en.txt", "ref1.de.txt", "ref2.de.txt", "refs.jsonl"] + [
        f"hyp.{s}.de.txt" for s in SYSTEMS
    ]
    for name in expected:
        assert (d / name).is_file(), f"`mtgauge demo --write-files` did not write {name}"
    return d


@pytest.fixture(scope="session")
def demo_refs(demo_dir):
    rows = read_jsonl(demo_dir / "refs.jsonl")
    ids = [r["id"] for r in rows]
    assert len(ids) == len(set(ids)) == 300, "refs.jsonl: expected 300 distinct ids"
    assert ids[0] == "notice-0001", ids[0]
    return rows


class Server:
    def __init__(self, proc, grpc_addr, metrics_addr, log_lines):
        self.proc = proc
        self.grpc_addr = grpc_addr
        self.metrics_addr = metrics_addr
        self.log_lines = log_lines

    def log_tail(self, n=40):
        return "\n".join(self.log_lines[-n:])


@pytest.fixture(scope="session")
def server(demo_dir):
    binary = require_binary()
    cmd = [
        str(binary), "serve",
        "--listen", "127.0.0.1:0",
        "--metrics-listen", "127.0.0.1:0",
        "--refset", f"ferry={demo_dir / 'refs.jsonl'}",
        "--refset-dir", str(demo_dir),
        "--data-dir", str(demo_dir / "data"),
        # A named replica of a two-replica fleet (producer affinity, README).
        "--replica-name", AFFINITY_FLEET[0], "--fleet", ",".join(AFFINITY_FLEET),
    ]
    proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    log_lines = []
    lines_q = queue.Queue()

    def drain():
        # Reads stderr until EOF for the whole life of the server, so the pipe never fills.
        for raw in proc.stderr:
            line = ANSI_RE.sub("", raw.decode("utf-8", "replace").rstrip("\n"))
            log_lines.append(line)
            lines_q.put(line)
        lines_q.put(None)

    drainer = threading.Thread(target=drain, name="mtgauge-stderr", daemon=True)
    drainer.start()

    def stop():
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=SHUTDOWN_TIMEOUT)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)
                drainer.join(timeout=10)
                return False
        drainer.join(timeout=10)
        return True

    grpc_addr = metrics_addr = None
    deadline = time.monotonic() + STARTUP_TIMEOUT
    try:
        while grpc_addr is None:
            left = deadline - time.monotonic()
            if left <= 0:
                pytest.fail(f"no 'listening grpc=...' line on stderr within {STARTUP_TIMEOUT} s:\n"
                            + "\n".join(log_lines[-40:]), pytrace=False)
            try:
                line = lines_q.get(timeout=left)
            except queue.Empty:
                continue
            if line is None:
                proc.wait(timeout=10)
                pytest.fail(f"server exited with {proc.returncode} before listening:\n"
                            + "\n".join(log_lines[-40:]), pytrace=False)
            m = LISTENING_RE.search(line)
            if m:
                grpc_addr, metrics_addr = m.group(1), m.group(2)
    except BaseException:
        stop()
        raise

    srv = Server(proc, grpc_addr, metrics_addr, log_lines)
    yield srv

    was_running = proc.poll() is None
    graceful = stop()
    assert was_running, f"server died during the tests with {proc.returncode}:\n{srv.log_tail()}"
    assert graceful, (f"server did not exit within {SHUTDOWN_TIMEOUT} s of SIGTERM and was "
                      f"killed:\n{srv.log_tail()}")
    assert proc.returncode == 0, f"server exited {proc.returncode} after SIGTERM:\n{srv.log_tail()}"


@pytest.fixture(scope="session")
def channel(server):
    ch = grpc.insecure_channel(server.grpc_addr)
    try:
        grpc.channel_ready_future(ch).result(timeout=RPC_TIMEOUT)
    except grpc.FutureTimeoutError:
        ch.close()
        pytest.fail(f"gRPC channel to {server.grpc_addr} not ready within {RPC_TIMEOUT} s",
                    pytrace=False)
    yield ch
    ch.close()


@pytest.fixture(scope="session")
def serving(channel):
    """Waits for health SERVING (the server reports it once the startup sets are loaded)."""
    stub = health_pb2_grpc.HealthStub(channel)
    deadline = time.monotonic() + HEALTH_DEADLINE
    seen = []
    while True:
        try:
            resp = stub.Check(health_pb2.HealthCheckRequest(service=""), timeout=2.0)
            seen.append(health_pb2.HealthCheckResponse.ServingStatus.Name(resp.status))
            if resp.status == health_pb2.HealthCheckResponse.SERVING:
                return seen
        except grpc.RpcError as exc:
            seen.append(f"{exc.code()}: {exc.details()}")
        if time.monotonic() > deadline:
            pytest.fail(f"health of service '' not SERVING within {HEALTH_DEADLINE} s; "
                        f"saw {seen[-5:]}", pytrace=False)
        time.sleep(0.1)


@pytest.fixture(scope="session")
def api(stubs, channel, serving):
    class Api:
        sessions = stubs.sessions_grpc.SessionsStub(channel)
        scoring = stubs.scoring_grpc.ScoringStub(channel)
        refsets = stubs.refsets_grpc.RefSetsStub(channel)

    return Api


@pytest.fixture(scope="session")
def offline(mtgauge, demo_dir):
    """`mtgauge score --json` of each demo system against refs.jsonl, keyed by system."""
    cache = {}

    def get(system):
        if system not in cache:
            cache[system] = mtgauge.score_json([
                "--ref", demo_dir / "refs.jsonl",
                "--hyp", demo_dir / f"hyp.{system}.de.txt",
                *[a for m in METRICS for a in ("--metric", m)],
            ])
        return cache[system]

    return get


def metric_configs(stubs, names=METRICS):
    """One MetricConfig per name, every parameter left at its default (0 / empty)."""
    return [stubs.common.MetricConfig(name=n) for n in names]


def create_session(stubs, api, name, **extra):
    req = stubs.sessions.CreateSessionRequest(
        name=name, refset="ferry", config=stubs.common.ScoreConfig(metrics=metric_configs(stubs)),
        **extra)
    info = api.sessions.Create(req, timeout=RPC_TIMEOUT)
    assert info.name == name
    assert info.refset == "ferry"
    assert info.scored == 0
    return info


def stream_batches(api, batches):
    acks = list(api.scoring.Stream(iter(batches), timeout=STREAM_TIMEOUT))
    return acks


def check_acks(batches, acks, session, producer):
    assert len(acks) == len(batches), f"{len(batches)} batches sent, {len(acks)} acks"
    total = 0
    for batch, ack in zip(batches, acks):
        where = f"ack of sequence {batch.sequence}"
        assert ack.session == session, where
        assert ack.producer == producer, where
        assert ack.sequence == batch.sequence, where
        assert not ack.duplicate, where
        assert ack.rejected == 0 and list(ack.rejections) == [], (where, list(ack.rejections))
        assert ack.unknown == 0, where
        assert ack.scored == len(batch.items), (where, ack.scored, len(batch.items))
        total += ack.scored
    return total


def chrf_results(totals, where):
    """{metric: ChrfResult} of a Totals message; the entries come in the order chrf, chrf++."""
    names = [c.metric for c in totals.chrf]
    assert names == [m for m in ("chrf", "chrf++") if m in names], (where, names)
    assert len(set(names)) == len(names), (where, names)
    return {c.metric: c for c in totals.chrf}


def assert_stats_match_offline(report, off, where):
    """Integer statistics of a ScoresReport's cumulative part against `mtgauge score --json`."""
    cum = report.cumulative
    assert cum.segments == off["segments"] == 300, where
    assert cum.HasField("bleu"), where
    bleu = cum.bleu
    assert list(bleu.matched) == off["bleu"]["matched"], (where, "bleu.matched")
    assert list(bleu.candidates) == off["bleu"]["candidates"], (where, "bleu.candidates")
    assert bleu.tokens.hypothesis == off["bleu"]["tokens"]["hypothesis"], (where, "bleu.tokens.hypothesis")
    assert bleu.tokens.reference == off["bleu"]["tokens"]["reference"], (where, "bleu.tokens.reference")
    chrf = chrf_results(cum, where)
    assert sorted(chrf) == ["chrf", "chrf++"], (where, sorted(chrf))
    for json_name in ("chrf", "chrf++"):
        stats = chrf[json_name]
        for field in ("matched", "candidates", "reference"):
            assert list(getattr(stats.chars, field)) == off[json_name]["chars"][field], (
                where, f"{json_name}.chars.{field}")
    assert not chrf["chrf"].HasField("words"), (where, "chrF has no word orders")
    assert not chrf["chrf"].words.matched, (where, "chrF has no word orders")
    for field in ("matched", "candidates", "reference"):
        assert list(getattr(chrf["chrf++"].words, field)) == off["chrf++"]["words"][field], (
            where, f"chrf++.words.{field}")


def assert_metric_configs_equal(cfg, ocfg, where):
    """A ScoreConfig's MetricConfig entries against the `config.metrics` of `score --json`."""
    by_name = {m.name: m for m in cfg.metrics}
    assert len(by_name) == len(cfg.metrics), (where, [m.name for m in cfg.metrics])
    assert sorted(by_name) == sorted(ocfg["metrics"]), (where, sorted(by_name))
    for name, want in ocfg["metrics"].items():
        m = by_name[name]
        if name == "bleu":
            got = {"order": m.order, "ref-length": m.ref_length, "smoothing": m.smoothing,
                   "epsilon": m.epsilon}
            unset = (m.chars, m.words, m.beta)
        else:
            got = {"chars": m.chars, "words": m.words, "beta": m.beta}
            unset = (m.order, m.ref_length, m.smoothing, m.epsilon)
        assert got == want, (where, name, got, want)
        # "a parameter the metric does not have must be left unset" (common.proto)
        assert not any(unset), (where, name, "parameters of another metric are set", m)


# ---------------------------------------------------------------------------
# the model-v7 session, streamed once and shared by the streaming and duplicate tests


@pytest.fixture(scope="session")
def v7_stream(stubs, api, demo_dir, demo_refs):
    ids = [r["id"] for r in demo_refs]
    hyps = read_lines(demo_dir / "hyp.model-v7.de.txt")
    assert len(hyps) == len(ids) == 300
    create_session(stubs, api, V7_SESSION)
    items = [stubs.scoring.ScoreItem(segment_id=i, hypothesis=h) for i, h in zip(ids, hyps)]
    batches = [
        stubs.scoring.ScoreBatch(session=V7_SESSION, producer=V7_PRODUCER, sequence=seq,
                                 items=chunk)
        for seq, chunk in enumerate(batches_of(items, BATCH_SIZE), start=1)
    ]
    acks = stream_batches(api, batches)
    report = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=V7_SESSION),
                                   timeout=RPC_TIMEOUT)
    return {"batches": batches, "acks": acks, "report": report}


# ---------------------------------------------------------------------------
# tests


def test_health_serving(serving, channel):
    # `serving` has polled Check("") until SERVING; check once more directly.
    stub = health_pb2_grpc.HealthStub(channel)
    resp = stub.Check(health_pb2.HealthCheckRequest(service=""), timeout=RPC_TIMEOUT)
    assert resp.status == health_pb2.HealthCheckResponse.SERVING, (serving, resp)


def _list_services_v1alpha(channel):
    stub = reflection_pb2_grpc.ServerReflectionStub(channel)
    req = reflection_pb2.ServerReflectionRequest(list_services="")
    responses = list(stub.ServerReflectionInfo(iter([req]), timeout=RPC_TIMEOUT))
    assert len(responses) == 1, responses
    assert responses[0].WhichOneof("message_response") == "list_services_response", responses[0]
    return [s.name for s in responses[0].list_services_response.service]


def _list_services_v1(channel):
    # grpcio-reflection 1.85.1 ships only v1alpha; v1 is the same messages under the package
    # grpc.reflection.v1 (from memory, see the module docstring), so call it by its path.
    call = channel.stream_stream(
        "/grpc.reflection.v1.ServerReflection/ServerReflectionInfo",
        request_serializer=reflection_pb2.ServerReflectionRequest.SerializeToString,
        response_deserializer=reflection_pb2.ServerReflectionResponse.FromString,
    )
    req = reflection_pb2.ServerReflectionRequest(list_services="")
    responses = list(call(iter([req]), timeout=RPC_TIMEOUT))
    assert len(responses) == 1, responses
    assert responses[0].WhichOneof("message_response") == "list_services_response", responses[0]
    return [s.name for s in responses[0].list_services_response.service]


REQUIRED_SERVICES = {"mtgauge.v1.Scoring", "mtgauge.v1.Sessions", "mtgauge.v1.RefSets",
                     "grpc.health.v1.Health"}


def test_reflection_lists_services(serving, channel):
    v1alpha = _list_services_v1alpha(channel)
    missing = REQUIRED_SERVICES - set(v1alpha)
    assert not missing, f"v1alpha reflection lacks {sorted(missing)}; lists {v1alpha}"
    v1 = _list_services_v1(channel)
    missing = REQUIRED_SERVICES - set(v1)
    assert not missing, f"v1 reflection lacks {sorted(missing)}; lists {v1}"
    # Each version lists its own reflection service (tonic-reflection 0.14 as used by the
    # server does not list the other version); everything else is the same in both.
    assert "grpc.reflection.v1alpha.ServerReflection" in v1alpha, v1alpha
    assert "grpc.reflection.v1.ServerReflection" in v1, v1
    def not_reflection(names):
        return sorted(n for n in names if not n.startswith("grpc.reflection."))

    assert not_reflection(v1) == not_reflection(v1alpha), (v1, v1alpha)


def test_reflection_descriptors_match_proto(serving, channel, stubs):
    """The service descriptors served by reflection equal those generated from proto/."""
    pool = descriptor_pool.DescriptorPool(ProtoReflectionDescriptorDatabase(channel))
    generated = {
        "mtgauge.v1.Scoring": stubs.scoring.DESCRIPTOR.services_by_name["Scoring"],
        "mtgauge.v1.Sessions": stubs.sessions.DESCRIPTOR.services_by_name["Sessions"],
        "mtgauge.v1.RefSets": stubs.refsets.DESCRIPTOR.services_by_name["RefSets"],
    }
    for full_name, gen in generated.items():
        served = pool.FindServiceByName(full_name)

        def shape(svc):
            return sorted(
                (m.name, m.input_type.full_name, m.output_type.full_name,
                 m.client_streaming, m.server_streaming)
                for m in svc.methods
            )

        assert shape(served) == shape(gen), full_name


def test_stream_scores_match_offline(v7_stream, offline):
    batches, acks, report = v7_stream["batches"], v7_stream["acks"], v7_stream["report"]
    # 300 items in batches of 37: 8 full batches and one of 4.
    assert [len(b.items) for b in batches] == [37] * 8 + [4]
    assert check_acks(batches, acks, V7_SESSION, V7_PRODUCER) == 300

    off = offline("model-v7")
    assert report.session == V7_SESSION
    assert report.refset_digest == off["refset"]["digest"]
    assert report.unknown == 0 and report.rejected == 0
    assert_stats_match_offline(report, off, "model-v7 via Stream")

    sc = report.cumulative
    assert sc.segments == 300
    assert sc.HasField("bleu")
    chrf = chrf_results(sc, "model-v7 cumulative")
    assert sorted(chrf) == ["chrf", "chrf++"]
    assert abs(sc.bleu.score - off["bleu"]["score"]) <= 1e-9, (sc.bleu.score, off["bleu"]["score"])
    assert abs(sc.bleu.brevity - off["bleu"]["brevity"]) <= 1e-9
    assert list(sc.bleu.precision) == pytest.approx(off["bleu"]["precision"], abs=1e-9)
    assert abs(sc.bleu.tokens.ratio - off["bleu"]["tokens"]["ratio"]) <= 1e-12
    for name in ("chrf", "chrf++"):
        c, oc = chrf[name], off[name]
        assert abs(c.score - oc["score"]) <= 1e-9, (name, c.score, oc["score"])
        assert abs(c.precision - oc["precision"]) <= 1e-9, (name, c.precision, oc["precision"])
        assert abs(c.recall - oc["recall"]) <= 1e-9, (name, c.recall, oc["recall"])

    # All 300 segments are inside the default window of 1000 (sessions.proto): the recent
    # totals are the cumulative ones.
    assert report.window == 1000
    assert report.recent == report.cumulative

    # The configuration the session reports, every default filled in, is the offline one.
    cfg, ocfg = report.config, off["config"]
    assert [m.name for m in cfg.metrics] == list(ocfg["metrics"]) == METRICS
    assert cfg.tokenizer == ocfg["tokenizer"]
    assert cfg.caseless == ocfg["caseless"]
    assert_metric_configs_equal(cfg, ocfg, "model-v7 session")


def test_live_traffic_source_lookup(stubs, api, demo_dir, demo_refs, offline):
    name, producer = "py-v8-live", "py-live-1"
    sources = read_lines(demo_dir / "source.en.txt")
    hyps = read_lines(demo_dir / "hyp.model-v8-rc.de.txt")
    assert len(sources) == len(hyps) == 300
    # The demo's source file is line-aligned with the sources of refs.jsonl.
    assert sources == [r["source"] for r in demo_refs]
    create_session(stubs, api, name)
    items = [stubs.scoring.ScoreItem(source=s, hypothesis=h) for s, h in zip(sources, hyps)]
    batches = [
        stubs.scoring.ScoreBatch(session=name, producer=producer, sequence=seq, items=chunk)
        for seq, chunk in enumerate(batches_of(items, BATCH_SIZE), start=1)
    ]
    acks = stream_batches(api, batches)
    assert check_acks(batches, acks, name, producer) == 300
    report = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=name),
                                   timeout=RPC_TIMEOUT)
    assert report.unknown == 0 and report.rejected == 0
    off = offline("model-v8-rc")
    assert_stats_match_offline(report, off, "model-v8-rc via source lookup")
    assert abs(report.cumulative.bleu.score - off["bleu"]["score"]) <= 1e-9


GUARD_NAMES = ["empty", "copy", "length", "repetition", "script", "language"]
# Invented: a Russian notice (wrong script for a German target).
RUSSIAN_NOTICE = "Паром в Северную гавань отправляется через десять минут от третьего причала."


def guard_items(stubs, demo_refs):
    """(item, what the guards must flag by their documented rules, what they must not) for a
    German session: clean translations, and one of each pathology (README, src/guard)."""
    out = []
    for k, row in enumerate(demo_refs[:12]):
        src, ref = row["source"], row["refs"][0]
        kind = k % 6
        if kind == 0:
            hyp, must, must_not = ref, set(), {"empty", "copy", "repetition", "script"}
        elif kind == 1:
            hyp, must, must_not = "", {"empty"}, {"copy", "script"}
        elif kind == 2:
            # The English source passed through: a copy, and English where German is due
            # (the notices are over 30 letters long: the language guard decides).
            hyp, must, must_not = src, {"copy"}, {"empty", "repetition"}
        elif kind == 3:
            words = ref.split()[:4]
            hyp, must, must_not = " ".join(words * 5), {"repetition"}, {"empty", "copy"}
        elif kind == 4:
            hyp, must, must_not = RUSSIAN_NOTICE, {"script", "language"}, {"empty", "copy"}
        else:
            hyp, must, must_not = ref + " " + ref, set(), {"empty", "copy", "script"}
        key = {"source": src} if k % 2 == 0 else {"segment_id": row["id"]}
        out.append((stubs.scoring.ScoreItem(hypothesis=hyp, **key), must, must_not))
    return out


def check_guard_ack(ack, expected, where):
    """Per-item verdicts against the rules, and the ack's tally equal to the verdicts' sum."""
    assert ack.guards.checked == len(expected), (where, ack.guards)
    verdicts = {v.index: v for v in ack.guard_verdicts}
    assert sorted(verdicts) == list(range(len(expected))), (where, sorted(verdicts))
    for i, (_, must, must_not) in enumerate(expected):
        flagged = set(verdicts[i].flagged)
        undecided = set(verdicts[i].undecided)
        assert flagged <= set(GUARD_NAMES) and undecided <= set(GUARD_NAMES), (where, i)
        assert not flagged & undecided, (where, i, flagged, undecided)
        assert must <= flagged, (where, i, must, flagged)
        assert not must_not & flagged, (where, i, must_not, flagged)
    for g in GUARD_NAMES:
        assert ack.guards.flagged.get(g, 0) == sum(g in v.flagged for v in verdicts.values()), (where, g)
        assert ack.guards.undecided.get(g, 0) == sum(g in v.undecided for v in verdicts.values()), (where, g)


def test_guard_fields_of_acks_and_verdicts(stubs, api, demo_refs):
    """The guard fields of an acknowledgement (tally and per-item verdicts with
    want_segment_scores) in a German session over the demo set, and in a reference-free
    session (no reference set, target language only; items are unknown and still checked)."""
    expected = guard_items(stubs, demo_refs)
    items = [it for it, _, _ in expected]
    info = create_session(stubs, api, "py-guards", target_language="de")
    # What the session's guards learned from the set (SessionInfo.guard_setup): the expected
    # length ratio is the references' non-space characters over their sources' (README, the
    # length guard's definition), each reference counted against its source; and a vocabulary.
    def solid(text):
        return sum(1 for c in text if not c.isspace())
    ref_chars = sum(solid(r) for row in demo_refs for r in row["refs"])
    src_chars = sum(solid(row["source"]) * len(row["refs"]) for row in demo_refs)
    setup = info.guard_setup
    assert setup.length_ratio_from == "learned", setup
    assert abs(setup.length_ratio - ref_chars / src_chars) < 1e-12, (setup, ref_chars, src_chars)
    assert setup.vocabulary_words > 0 and setup.no_vocabulary_because == "", setup
    ack = api.scoring.Submit(stubs.scoring.ScoreBatch(
        session="py-guards", producer="py-guards-1", sequence=1, items=items,
        want_segment_scores=True), timeout=RPC_TIMEOUT)
    assert ack.scored == len(items) and ack.unknown == 0
    check_guard_ack(ack, expected, "py-guards")
    # Without want_segment_scores: the tally, no verdicts.
    again = api.scoring.Submit(stubs.scoring.ScoreBatch(
        session="py-guards", producer="py-guards-1", sequence=2, items=items), timeout=RPC_TIMEOUT)
    assert list(again.guard_verdicts) == [] and again.guards == ack.guards
    report = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session="py-guards"),
                                   timeout=RPC_TIMEOUT)
    assert report.guards.checked == 2 * len(items) and report.target_language == "de"

    # Reference-free: only items keyed by their source are checked (an id names nothing).
    info = api.sessions.Create(stubs.sessions.CreateSessionRequest(
        name="py-guards-free", config=stubs.common.ScoreConfig(metrics=metric_configs(stubs)),
        target_language="deu"), timeout=RPC_TIMEOUT)
    assert info.refset == "" and info.target_language == "de"
    assert info.guard_setup.length_ratio_from == "default" and info.guard_setup.length_ratio == 1.0
    assert info.guard_setup.vocabulary_words == 0 and info.guard_setup.no_vocabulary_because == "no references"
    by_source = [(stubs.scoring.ScoreItem(source=row["source"], hypothesis=it.hypothesis), m, n)
                 for (it, m, n), row in zip(expected, demo_refs)]
    ack = api.scoring.Submit(stubs.scoring.ScoreBatch(
        session="py-guards-free", producer="py-guards-1", sequence=1,
        items=[it for it, _, _ in by_source], want_segment_scores=True), timeout=RPC_TIMEOUT)
    assert ack.scored == 0 and ack.unknown == len(by_source)
    check_guard_ack(ack, by_source, "py-guards-free")
    with pytest.raises(grpc.RpcError) as e:
        api.sessions.Create(stubs.sessions.CreateSessionRequest(
            name="py-guards-none", config=stubs.common.ScoreConfig(metrics=metric_configs(stubs))),
            timeout=RPC_TIMEOUT)
    assert e.value.code() == grpc.StatusCode.INVALID_ARGUMENT


def test_duplicate_batch_not_counted_again(stubs, api, v7_stream):
    before = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=V7_SESSION),
                                   timeout=RPC_TIMEOUT)
    assert before.cumulative.segments == 300
    first = v7_stream["batches"][0]
    assert first.sequence == 1 and first.producer == V7_PRODUCER
    ack = api.scoring.Submit(first, timeout=RPC_TIMEOUT)
    assert ack.duplicate, f"resent (producer {V7_PRODUCER}, sequence 1) not flagged: {ack}"
    assert ack.session == V7_SESSION and ack.producer == V7_PRODUCER and ack.sequence == 1
    after = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=V7_SESSION),
                                  timeout=RPC_TIMEOUT)
    assert after.cumulative == before.cumulative
    # the scores are part of Totals now: compared on their own as well
    assert after.cumulative.bleu.score == before.cumulative.bleu.score
    assert [c.score for c in after.cumulative.chrf] == [c.score for c in before.cumulative.chrf]
    assert after.recent == before.recent
    assert after.unknown == before.unknown and after.rejected == before.rejected


def _expect_error(code, fn, *args):
    with pytest.raises(grpc.RpcError) as info:
        fn(*args, timeout=RPC_TIMEOUT)
    err = info.value
    assert err.code() == code, f"expected {code}, got {err.code()}: {err.details()!r}"
    assert err.details() and err.details().strip(), f"{code} with an empty message"
    return err


def test_error_unknown_session_not_found(stubs, api):
    _expect_error(grpc.StatusCode.NOT_FOUND, api.scoring.GetScores,
                  stubs.scoring.GetScoresRequest(session="py-no-such-session"))


def test_error_bad_session_name_invalid_argument(stubs, api):
    req = stubs.sessions.CreateSessionRequest(
        name='bad name"', refset="ferry",
        config=stubs.common.ScoreConfig(metrics=metric_configs(stubs)))
    _expect_error(grpc.StatusCode.INVALID_ARGUMENT, api.sessions.Create, req)


def test_error_load_outside_refset_dir_permission_denied(stubs, api):
    req = stubs.refsets.LoadRefSetRequest(
        name="py-escape", format=stubs.refsets.REF_FORMAT_JSONL, paths=["../etc/passwd"])
    _expect_error(grpc.StatusCode.PERMISSION_DENIED, api.refsets.Load, req)


def test_error_empty_batch_invalid_argument(stubs, api):
    # An existing session, so the only thing wrong with the batch is that it is empty.
    create_session(stubs, api, "py-empty-batch")
    batch = stubs.scoring.ScoreBatch(session="py-empty-batch", producer="py-empty", sequence=1)
    _expect_error(grpc.StatusCode.INVALID_ARGUMENT, api.scoring.Submit, batch)


# ---------------------------------------------------------------------------
# a session with a non-default BLEU epsilon, against NLTK 3.10.4

EPS = 0.05  # not the default 0.1 of bleu:epsilon
EPS_REFSET = "py-eps"
EPS_SEGMENTS = 400


@pytest.fixture(scope="session")
def eps_corpus(stubs, api, demo_dir, tmp_path_factory):
    """An invented corpus (mtg_helpers.make_bleu_corpus) loaded as the reference set py-eps.

    Hypotheses have at least 4 tokens and no reference is empty, so every segment is scored
    (no empty hypothesis), and many segments lack a 3-gram or 4-gram match: the segments on
    which the epsilon smoothing is used."""
    hyps, refs = make_bleu_corpus(seed=50505, nseg=EPS_SEGMENTS, min_refs=1, max_refs=3)
    ids = [str(i) for i in range(1, EPS_SEGMENTS + 1)]  # the ids write_refs_jsonl gives
    # the reference file must lie under the server's --refset-dir (demo_dir)
    write_refs_jsonl(demo_dir / "py-eps.jsonl", [[" ".join(r) for r in rs] for rs in refs])
    d = tmp_path_factory.mktemp("eps")
    hyp_file = write_lines(d / "hyp.txt", [" ".join(h) for h in hyps])
    ids_file = write_lines(d / "ids.txt", ids)
    info = api.refsets.Load(stubs.refsets.LoadRefSetRequest(
        name=EPS_REFSET, format=stubs.refsets.REF_FORMAT_JSONL, paths=["py-eps.jsonl"]),
        timeout=RPC_TIMEOUT)
    assert info.segments == EPS_SEGMENTS, info
    return {"hyps": hyps, "refs": refs, "ids": ids, "hyp_file": hyp_file, "ids_file": ids_file,
            "ref_file": demo_dir / "py-eps.jsonl"}


def nltk_sentence_bleu_100(refs, hyp, eps):
    # NLTK 3.10.4 sentence_bleu, uniform weights, SmoothingFunction(epsilon=eps).method1, 0-100
    return 100 * sentence_bleu(refs, hyp, smoothing_function=SmoothingFunction(epsilon=eps).method1)


def assert_eps_config(cfg, where):
    """The configuration of an epsilon session with every default filled in."""
    assert cfg.tokenizer == "whitespace", (where, cfg)
    assert cfg.caseless is False, (where, cfg)
    assert [m.name for m in cfg.metrics] == ["bleu"], (where, cfg)
    (bleu,) = cfg.metrics
    # the defaults of common.proto: order 4, ref_length closest, smoothing epsilon
    assert (bleu.order, bleu.ref_length, bleu.smoothing) == (4, "closest", "epsilon"), (where, bleu)
    assert bleu.epsilon == EPS, (where, bleu.epsilon)
    assert (bleu.chars, bleu.words, bleu.beta) == (0, 0, 0.0), (where, "chrF parameters set on bleu")


def segment_scores_with_eps(stubs, api, session, corpus, producer):
    """Submit the corpus with want_segment_scores; return {segment_id: sentence BLEU}."""
    items = [stubs.scoring.ScoreItem(segment_id=i, hypothesis=" ".join(h))
             for i, h in zip(corpus["ids"], corpus["hyps"])]
    got = {}
    for seq, chunk in enumerate(batches_of(items, 50), start=1):
        ack = api.scoring.Submit(stubs.scoring.ScoreBatch(
            session=session, producer=producer, sequence=seq, items=chunk,
            want_segment_scores=True), timeout=RPC_TIMEOUT)
        assert not ack.duplicate and ack.scored == len(chunk), ack
        assert ack.unknown == 0 and ack.rejected == 0, ack
        assert len(ack.segment_scores) == len(chunk), (len(ack.segment_scores), len(chunk))
        for s in ack.segment_scores:
            assert chunk[s.index].segment_id == s.segment_id, (s.index, s.segment_id)
            assert sorted(s.scores) == ["bleu"], dict(s.scores)
            got[s.segment_id] = s.scores["bleu"]
    assert len(got) == len(items)
    return got


def check_sentence_scores_vs_nltk(got, corpus, where):
    bad, differs, tol = [], 0, 1e-9
    for seg_id, h, rs in zip(corpus["ids"], corpus["hyps"], corpus["refs"]):
        want = nltk_sentence_bleu_100(rs, h, EPS)
        default = nltk_sentence_bleu_100(rs, h, 0.1)
        # segments where some order has no match: there the epsilon changes the score
        if min(modified_precision(rs, h, n).numerator for n in range(1, 5)) == 0 and want > 0:
            differs += abs(want - default) > 1e-6
        if abs(got[seg_id] - want) > tol:
            bad.append((seg_id, got[seg_id], want, default))
    assert differs > 50, f"{where}: only {differs} segments where epsilon 0.05 and 0.1 differ"
    assert not bad, (f"{where}: {len(bad)} sentence BLEU mismatches vs NLTK 3.10.4 method1 "
                     f"epsilon={EPS}; first (id, got, want, with epsilon 0.1): {bad[:3]}")


def test_send_create_with_bleu_epsilon(mtgauge, server, stubs, api, eps_corpus):
    """`mtgauge send --create --metric bleu:epsilon=0.05`: the session reports that epsilon and
    computes its sentence scores with it; the corpus statistics equal the offline ones."""
    session = "py-eps-cli"
    proc = mtgauge.run_ok(["send", "--server", f"http://{server.grpc_addr}", "--session", session,
                           "--create", "--refset", EPS_REFSET, "--tokenizer", "whitespace",
                           "--metric", f"bleu:epsilon={EPS}", "--hyp", eps_corpus["hyp_file"],
                           "--ids", eps_corpus["ids_file"], "--producer", "py-eps-send", "--json"])
    ack = json.loads(proc.stdout.decode("utf-8"))
    assert (ack["scored"], ack["unknown"], ack["rejected"]) == (EPS_SEGMENTS, 0, 0), ack

    info = api.sessions.Get(stubs.sessions.GetSessionRequest(name=session), timeout=RPC_TIMEOUT)
    assert info.refset == EPS_REFSET and info.scored == EPS_SEGMENTS, info
    assert_eps_config(info.config, "SessionInfo.config of the send-created session")

    # the offline score of the same files with the same metric spec
    off = mtgauge.score_json(["--ref", eps_corpus["ref_file"], "--hyp", eps_corpus["hyp_file"],
                              "--tokenizer", "whitespace", "--metric", f"bleu:epsilon={EPS}"])
    assert off["config"]["metrics"] == {"bleu": {"order": 4, "ref-length": "closest",
                                                 "smoothing": "epsilon", "epsilon": EPS}}
    report = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=session),
                                   timeout=RPC_TIMEOUT)
    assert_eps_config(report.config, "ScoresReport.config of the send-created session")
    cum = report.cumulative
    assert cum.segments == EPS_SEGMENTS and list(cum.chrf) == [], cum
    assert list(cum.bleu.matched) == off["bleu"]["matched"]
    assert list(cum.bleu.candidates) == off["bleu"]["candidates"]
    assert cum.bleu.tokens.hypothesis == off["bleu"]["tokens"]["hypothesis"]
    assert cum.bleu.tokens.reference == off["bleu"]["tokens"]["reference"]
    # the corpus score has no smoothing, whatever the epsilon
    assert abs(cum.bleu.score - off["bleu"]["score"]) <= 1e-9, (cum.bleu.score, off["bleu"]["score"])

    # sentence scores of the same session (a second producer: its items count once more)
    got = segment_scores_with_eps(stubs, api, session, eps_corpus, "py-eps-segments")
    check_sentence_scores_vs_nltk(got, eps_corpus, "send-created session")


def test_client_create_with_metric_config_epsilon(stubs, api, eps_corpus, mtgauge, tmp_path):
    """The same through the generated client: MetricConfig(name="bleu", epsilon=0.05)."""
    session = "py-eps-client"
    req = stubs.sessions.CreateSessionRequest(
        name=session, refset=EPS_REFSET,
        config=stubs.common.ScoreConfig(
            tokenizer="whitespace", metrics=[stubs.common.MetricConfig(name="bleu", epsilon=EPS)]))
    info = api.sessions.Create(req, timeout=RPC_TIMEOUT)
    assert info.name == session and info.scored == 0
    assert_eps_config(info.config, "SessionInfo.config of Create")
    listed = [s for s in api.sessions.List(stubs.sessions.ListSessionsRequest(),
                                           timeout=RPC_TIMEOUT).sessions if s.name == session]
    assert len(listed) == 1
    assert_eps_config(listed[0].config, "SessionInfo.config of List")

    got = segment_scores_with_eps(stubs, api, session, eps_corpus, "py-eps-client-1")
    check_sentence_scores_vs_nltk(got, eps_corpus, "client-created session")
    # the offline per-segment scores with the same spec are the same numbers
    seg_file = tmp_path / "seg.jsonl"
    mtgauge.score_json(["--ref", eps_corpus["ref_file"], "--hyp", eps_corpus["hyp_file"],
                        "--tokenizer", "whitespace", "--metric", f"bleu:epsilon={EPS}",
                        "--per-segment", seg_file])
    offline_segs = {s["id"]: s["bleu"]["score"] for s in read_jsonl(seg_file)}
    assert offline_segs.keys() == got.keys()
    bad = [(k, got[k], offline_segs[k]) for k in got if abs(got[k] - offline_segs[k]) > 1e-9]
    assert not bad, f"{len(bad)} gRPC vs offline sentence BLEU mismatches; first: {bad[:3]}"


def test_load_reports_its_config_line(mtgauge, server, serving):
    """`mtgauge load --metric SPEC ... --json` names the configuration in one line under
    "config" (the key "metrics" of before is gone)."""
    proc = mtgauge.run(["load", "--server", f"http://{server.grpc_addr}", "--streams", "2",
                        "--batch", "50", "--seconds", "1", "--segments", "500",
                        "--metric", "bleu:order=2", "--metric", "chrf++:words=1", "--json"],
                       timeout=120)
    assert proc.returncode == 0, proc.stderr.decode("utf-8", "replace")[-2000:]
    figures = json.loads(proc.stdout.decode("utf-8"))
    assert "metrics" not in figures, sorted(figures)
    assert figures["config"] == ("tokenizer=nist caseless=no "
                                 "bleu:order=2,ref-length=closest,smoothing=epsilon,epsilon=0.1 "
                                 "chrf++:chars=6,words=1,beta=2"), figures["config"]


def test_load_with_guards_checks_every_item(mtgauge, server, serving):
    """`mtgauge load --guards` uploads sources, so the daemon's guards check the items it
    sends (all acknowledged, none flagged as empty or copied: the sources are other generated
    sentences); without --guards nothing is checked."""
    def run(extra):
        proc = mtgauge.run(["load", "--server", f"http://{server.grpc_addr}", "--streams", "2",
                            "--batch", "50", "--seconds", "1", "--segments", "500", "--json"] + extra,
                           timeout=120)
        assert proc.returncode == 0, proc.stderr.decode("utf-8", "replace")[-2000:]
        return json.loads(proc.stdout.decode("utf-8"))
    off = run([])
    assert off["guards_on"] is False and off["guards"]["checked"] == 0, off["guards"]
    on = run(["--guards", "--target-language", "de", "--guard-setting", "language-id=off"])
    g = on["guards"]
    assert on["guards_on"] is True and on["guard_settings"] == ["language-id=off"]
    assert g["checked"] > 0 and g["target_language"] == "de", g
    assert g["by_guard"]["empty"]["flagged"] == 0 and g["by_guard"]["copy"]["flagged"] == 0, g
    # Generated words are Latin letters: the script guard passes them all.
    assert g["by_guard"]["script"]["flagged"] == 0 and g["by_guard"]["script"]["undecided"] == 0, g


# ---------------------------------------------------------------------------
# intervals and comparisons through the API (the expected numbers come from the binary's own
# offline `score --interval`: the same Poisson weights keyed by segment id)


def test_intervals_by_level_and_resampling(stubs, api, mtgauge, demo_dir, v7_stream):
    info = api.sessions.Get(stubs.sessions.GetSessionRequest(name=V7_SESSION), timeout=RPC_TIMEOUT)
    assert (info.resampling.resamples, info.resampling.seed) == (200, 1), "the daemon's defaults"
    report = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=V7_SESSION), timeout=RPC_TIMEOUT)
    off = mtgauge.score_json(["--ref", demo_dir / "refs.jsonl", "--hyp", demo_dir / "hyp.model-v7.de.txt",
                              *[a for m in METRICS for a in ("--metric", m)],
                              "--interval", "--resamples", "200", "--seed", "1"])
    got = report.cumulative.bleu.interval
    want = off["bleu"]["interval"]
    assert (got.level, got.resamples, got.seed, got.method) == (0.95, 200, 1, want["method"])
    assert (got.low, got.high) == (want["low"], want["high"]), (got, want)
    assert report.recent.bleu.interval.low == got.low, "the window holds every segment"
    assert report.interval_note == ""
    for c in report.cumulative.chrf:
        assert c.interval.low < c.score < c.interval.high, c
    # A lower level gives a narrower interval around the same replicates.
    narrow = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=V7_SESSION, level=0.5),
                                   timeout=RPC_TIMEOUT).cumulative.bleu.interval
    assert got.low < narrow.low < narrow.high < got.high, (got, narrow)
    _expect_error(grpc.StatusCode.INVALID_ARGUMENT, api.scoring.GetScores,
                  stubs.scoring.GetScoresRequest(session=V7_SESSION, level=1.5))


def test_watch_streams_carry_intervals_at_their_own_level(stubs, api, v7_stream):
    """Two watchers of one session at different levels each get their own intervals (the
    publisher builds one report per session and level)."""
    def first(level):
        stream = api.scoring.WatchScores(stubs.scoring.WatchScoresRequest(session=V7_SESSION, interval_seconds=1, level=level),
                                         timeout=RPC_TIMEOUT)
        try:
            return next(iter(stream))
        finally:
            stream.cancel()
    wide, narrow = first(0.0), first(0.5)
    want = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=V7_SESSION, level=0.5), timeout=RPC_TIMEOUT)
    assert wide.cumulative.bleu.interval.level == 0.95 and narrow.cumulative.bleu.interval.level == 0.5
    assert narrow.cumulative.bleu.interval == want.cumulative.bleu.interval
    assert wide.cumulative.bleu.interval.low < narrow.cumulative.bleu.interval.low
    assert narrow.cumulative.bleu.interval.high < wide.cumulative.bleu.interval.high


def test_session_without_replicates_has_no_interval(stubs, api, demo_refs):
    name = "py-no-replicates"
    info = create_session(stubs, api, name, resampling=stubs.common.Resampling(resamples=0))
    assert info.resampling.resamples == 0
    item = stubs.scoring.ScoreItem(segment_id=demo_refs[0]["id"], hypothesis="Die Fähre fährt.")
    api.scoring.Submit(stubs.scoring.ScoreBatch(session=name, items=[item]), timeout=RPC_TIMEOUT)
    report = api.scoring.GetScores(stubs.scoring.GetScoresRequest(session=name), timeout=RPC_TIMEOUT)
    assert report.cumulative.segments == 1
    assert not report.cumulative.bleu.HasField("interval") and report.interval_note == ""
    # More replicates than a session may keep (1000: about ten copies of the sums each).
    req = stubs.sessions.CreateSessionRequest(name="py-too-many", refset="ferry",
                                              resampling=stubs.common.Resampling(resamples=1001))
    err = _expect_error(grpc.StatusCode.INVALID_ARGUMENT, api.sessions.Create, req)
    assert "1000" in err.details(), err.details()


def test_compare_call(stubs, api, demo_dir, demo_refs, v7_stream):
    ids = [r["id"] for r in demo_refs]
    for name, system in [("py-v7-copy", "model-v7"), ("py-fallback", "fallback-dictionary")]:
        create_session(stubs, api, name)
        hyps = read_lines(demo_dir / f"hyp.{system}.de.txt")
        items = [stubs.scoring.ScoreItem(segment_id=i, hypothesis=h) for i, h in zip(ids, hyps)]
        batches = [stubs.scoring.ScoreBatch(session=name, producer="py", sequence=s, items=chunk)
                   for s, chunk in enumerate(batches_of(items, BATCH_SIZE), start=1)]
        stream_batches(api, batches)
    same = api.scoring.Compare(stubs.scoring.CompareRequest(session_a=V7_SESSION, session_b="py-v7-copy", trials=500),
                               timeout=RPC_TIMEOUT)
    assert same.segments == 300 and (same.recent_a, same.recent_b) == (300, 300)
    bleu = next(m for m in same.metrics if m.metric == "bleu")
    assert (bleu.difference, bleu.p_value, bleu.trials) == (0.0, 1.0, 500)
    worse = api.scoring.Compare(stubs.scoring.CompareRequest(session_a=V7_SESSION, session_b="py-fallback"),
                                timeout=RPC_TIMEOUT)
    bleu = next(m for m in worse.metrics if m.metric == "bleu")
    assert bleu.difference == bleu.a - bleu.b > 0 and bleu.interval.low > 0 and bleu.p_value < 0.01, bleu
    assert (worse.resamples, worse.trials, worse.seed, worse.level) == (200, 10000, 1, 0.95)
    _expect_error(grpc.StatusCode.NOT_FOUND, api.scoring.Compare,
                  stubs.scoring.CompareRequest(session_a=V7_SESSION, session_b="py-no-such-session"))


# ---------------------------------------------------------------------------------------------
# Producer affinity, implemented here from README.md's description of the rule alone: weight(r,
# p) = the first 8 bytes, big-endian, of SHA-256("mtgauge-affinity-v1" 0x00 r 0x00 p); the
# owner is the replica of largest weight (ties: the name that sorts first). SHA-256: Python's
# hashlib (FIPS 180-4).

def affinity_weight(replica, producer):
    import hashlib
    digest = hashlib.sha256(b"mtgauge-affinity-v1\0" + replica.encode() + b"\0" + producer.encode()).digest()
    return int.from_bytes(digest[:8], "big")


def affinity_owner(producer, replicas):
    return min(replicas, key=lambda r: (-affinity_weight(r, producer), r.encode()))


def test_affinity_rule_matches_the_readme_vectors():
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Producer affinity", 1)[1].split("\n### ", 1)[0]
    rows = re.findall(r"^\| `([^`]*)` \| (?:`([^`]*)`|\(empty\)) \| (\d+) \|$", section, re.M)
    assert len(rows) >= 5, rows
    for replica, producer, weight in rows:
        assert affinity_weight(replica, producer) == int(weight), (replica, producer)
    fleet = ["mtgauge-0", "mtgauge-1", "mtgauge-2"]
    for producer, owner in [("probe-worker-1", "mtgauge-0"), ("probe-worker-2", "mtgauge-1"), ("probe-worker-10", "mtgauge-2")]:
        assert f"`{producer}` belongs to `{owner}`" in " ".join(section.split()) or f"`{producer}` to `{owner}`" in " ".join(section.split())
        assert affinity_owner(producer, fleet) == owner


def test_affinity_identify_and_misrouted_batch(stubs, api, demo_refs):
    """The server says its name and fleet; a batch routed by this client's own implementation
    of the rule is accepted by its replica, and one whose producer belongs to the other
    replica is refused with FAILED_PRECONDITION naming the rule."""
    ident = api.scoring.Identify(stubs.scoring.IdentifyRequest(), timeout=RPC_TIMEOUT)
    assert (ident.replica, list(ident.fleet)) == (AFFINITY_FLEET[0], AFFINITY_FLEET)
    create_session(stubs, api, "py-affinity")
    mine = next(p for p in (f"py-producer-{k}" for k in range(1000)) if affinity_owner(p, AFFINITY_FLEET) == "py-0")
    other = next(p for p in (f"py-producer-{k}" for k in range(1000)) if affinity_owner(p, AFFINITY_FLEET) == "py-1")
    seg = demo_refs[0]
    item = stubs.scoring.ScoreItem(segment_id=seg["id"], hypothesis=seg["refs"][0])

    def batch(producer):
        return stubs.scoring.ScoreBatch(session="py-affinity", producer=producer, sequence=1, items=[item],
                                        replicas=AFFINITY_FLEET)

    ack = api.scoring.Submit(batch(mine), timeout=RPC_TIMEOUT)
    assert ack.scored == 1 and not ack.duplicate
    with pytest.raises(grpc.RpcError) as e:
        api.scoring.Submit(batch(other), timeout=RPC_TIMEOUT)
    assert e.value.code() == grpc.StatusCode.FAILED_PRECONDITION
    assert f"producer '{other}' belongs to replica py-1, not to this replica (py-0)" in e.value.details()
    assert "Producer affinity" in e.value.details()
