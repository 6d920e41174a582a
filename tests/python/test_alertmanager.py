"""mtgauge's alert delivery against a real Alertmanager (Debian package prometheus-alertmanager).

Starts Alertmanager on loopback (clustering off, storage in a temporary folder) with a webhook
receiver that this test serves itself, then runs the Rust test `real_alertmanager`
(tests/alert_delivery.rs), which posts a firing and then a resolved alert through
`mtgauge::alerts::deliver` and checks Alertmanager's own alert list. This test then checks that
Alertmanager notified its webhook receiver of the group, firing first and resolved after.

Fails rather than skips without Alertmanager when MTGAUGE_REQUIRE_ALERTMANAGER=1 (CI sets it).

Outside facts, from memory (Alertmanager 0.25 as packaged by Debian): the flags
--config.file, --storage.path, --web.listen-address and --cluster.listen-address (empty turns
clustering off); GET /-/ready answers 200 once it serves; route settings group_by, group_wait,
group_interval, repeat_interval; a webhook_configs receiver with send_resolved POSTs
{"status": "firing"|"resolved", "alerts": [{"status", "labels", ...}], ...}.
"""

import json
import os
import re
import shutil
import socket
import subprocess
import threading
import time
import urllib.request
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import contextlib

import pytest

from mtg_helpers import REPO, require_binary

REQUIRE = os.environ.get("MTGAUGE_REQUIRE_ALERTMANAGER") == "1"


def alertmanager_bin():
    found = os.environ.get("ALERTMANAGER_BIN") or shutil.which("prometheus-alertmanager") or shutil.which("alertmanager")
    if not found or not os.access(found, os.X_OK):
        msg = "Alertmanager not found (ALERTMANAGER_BIN, prometheus-alertmanager, alertmanager); Debian: apt-get install prometheus-alertmanager"
        if REQUIRE:
            pytest.fail(f"MTGAUGE_REQUIRE_ALERTMANAGER=1 but {msg}", pytrace=False)
        pytest.skip(msg)
    return found


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Notifications:
    """What Alertmanager POSTs to the webhook receiver."""

    def __init__(self):
        self.lock = threading.Lock()
        self.bodies = []

    def handler(self):
        outer = self

        class H(BaseHTTPRequestHandler):
            def do_POST(self):
                n = int(self.headers.get("Content-Length", "0"))
                body = json.loads(self.rfile.read(n))
                with outer.lock:
                    outer.bodies.append(body)
                self.send_response(200)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):
                pass

        return H

    def for_run(self, run):
        with self.lock:
            return [b for b in self.bodies if any(a["labels"].get("run") == run for a in b.get("alerts", []))]


def test_firing_then_resolved_reach_alertmanager_and_its_receiver(tmp_path):
    binary = alertmanager_bin()
    version = subprocess.run([binary, "--version"], capture_output=True, text=True, timeout=30)
    print((version.stdout or version.stderr).splitlines()[0])

    notes = Notifications()
    with running_alertmanager(tmp_path, notes, ["alertname", "run"]) as base:
        run = f"py{os.getpid()}x{int(time.time())}"
        env = dict(os.environ, MTGAUGE_ALERTMANAGER_URL=base, MTGAUGE_ALERT_RUN=run, MTGAUGE_ALERT_FIRING_SECONDS="3")
        cargo = subprocess.run(
            ["cargo", "test", "--offline", "--quiet", "--test", "alert_delivery", "real_alertmanager",
             "--", "--exact", "--ignored", "--nocapture"],
            cwd=REPO, env=env, capture_output=True, text=True, timeout=900,
        )
        assert cargo.returncode == 0, f"real_alertmanager failed:\n{cargo.stdout}\n{cargo.stderr}"
        assert "1 passed" in cargo.stdout, cargo.stdout
        assert f"run {run} fired and resolved" in cargo.stdout, cargo.stdout

        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            if any(b["status"] == "resolved" for b in notes.for_run(run)):
                break
            time.sleep(0.2)
        got = notes.for_run(run)
        statuses = [b["status"] for b in got]
        assert "firing" in statuses and "resolved" in statuses, f"notifications: {got}"
        assert statuses.index("firing") < statuses.index("resolved"), statuses
        firing = got[statuses.index("firing")]
        resolved = got[statuses.index("resolved")]
        assert firing["receiver"] == "ferry-hook"
        assert firing["groupLabels"] == {"alertname": "FerryBleuDrop", "run": run}, firing["groupLabels"]
        [fa] = firing["alerts"]
        assert fa["status"] == "firing"
        assert fa["labels"]["session"] == "ferry-en-de.model-v7"
        assert "Kiel-Oslo" in fa["annotations"]["summary"]
        assert fa["generatorURL"] == "http://mtgauge.ferry.test:9464/alerts"
        [ra] = resolved["alerts"]
        assert ra["status"] == "resolved"
        assert ra["labels"] == fa["labels"]
        assert ra["startsAt"] == fa["startsAt"]
        assert ra["endsAt"] > ra["startsAt"]


@contextlib.contextmanager
def running_alertmanager(tmp_path, notes, group_by):
    """An Alertmanager on loopback whose one receiver is the webhook of `notes`; yields its URL."""
    binary = alertmanager_bin()
    hook = ThreadingHTTPServer(("127.0.0.1", 0), notes.handler())
    threading.Thread(target=hook.serve_forever, daemon=True).start()
    web_port = free_port()
    config = tmp_path / "alertmanager.yml"
    config.write_text(
        "route:\n"
        "  receiver: ferry-hook\n"
        f"  group_by: {json.dumps(group_by)}\n"
        "  group_wait: 1s\n"
        "  group_interval: 1s\n"
        "  repeat_interval: 1h\n"
        "receivers:\n"
        "  - name: ferry-hook\n"
        "    webhook_configs:\n"
        f"      - url: http://127.0.0.1:{hook.server_address[1]}/ferry-alerts\n"
        "        send_resolved: true\n"
    )
    (tmp_path / "data").mkdir()
    log = open(tmp_path / "alertmanager.log", "w+b")
    am = subprocess.Popen(
        [binary, f"--config.file={config}", f"--storage.path={tmp_path / 'data'}",
         f"--web.listen-address=127.0.0.1:{web_port}", "--cluster.listen-address="],
        stdout=log, stderr=subprocess.STDOUT,
    )
    base = f"http://127.0.0.1:{web_port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                with urllib.request.urlopen(f"{base}/-/ready", timeout=2) as r:
                    if r.status == 200:
                        break
            except OSError:
                pass
            if am.poll() is not None or time.monotonic() > deadline:
                log.seek(0)
                pytest.fail(f"Alertmanager did not become ready:\n{log.read().decode(errors='replace')}")
            time.sleep(0.1)
        yield base
    finally:
        am.terminate()
        try:
            am.wait(timeout=10)
        except subprocess.TimeoutExpired:
            am.kill()
        hook.shutdown()
        log.close()


def test_daemon_rules_fire_and_resolve_through_alertmanager(tmp_path):
    """The whole path: `mtgauge serve` with an [[alert]] rule and an [[alert_target]] pointing at a
    real Alertmanager; the degraded session's drop against production fires, Alertmanager
    notifies its receiver; closing the session resolves the alert there too."""
    mtgauge = require_binary()
    demo = tmp_path / "demo"
    subprocess.run([str(mtgauge), "demo", "--offline", "--write-files", str(demo)], check=True,
                   capture_output=True, timeout=120)
    ids = [json.loads(line)["id"] for line in (demo / "refs.jsonl").read_text(encoding="utf-8").splitlines()]
    (demo / "ids.txt").write_text("".join(i + "\n" for i in ids), encoding="utf-8")
    notes = Notifications()
    with running_alertmanager(tmp_path, notes, ["alertname", "session"]) as am_url:
        config = tmp_path / "mtgauge.toml"
        config.write_text(
            "alert_eval_seconds = 1\n"
            "[[alert]]\n"
            'name = "worse-than-production"\n'
            'session = "fallback"\n'
            'when = "drop"\n'
            'baseline = "v7"\n'
            "points = 5\n"
            "min_segments = 100\n"
            "for_seconds = 1\n"
            "[alert.extra_labels]\n"
            f'run = "daemon{os.getpid()}"\n'
            "[[alert_target]]\n"
            'kind = "alertmanager"\n'
            f'url = "{am_url}"\n'
        )
        log = open(tmp_path / "serve.log", "w+b")
        srv = subprocess.Popen([str(mtgauge), "serve", "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0",
                                "--durability", "none", "--config", str(config),
                                "--refset", f"ferry={demo / 'refs.jsonl'}"], stdout=log, stderr=subprocess.STDOUT)
        try:
            deadline = time.monotonic() + 30
            grpc = None
            while grpc is None:
                log.seek(0)
                m = re.search(rb"listening grpc=(\S+)", log.read())
                if m:
                    grpc = m.group(1).decode()
                elif srv.poll() is not None or time.monotonic() > deadline:
                    log.seek(0)
                    pytest.fail(f"mtgauge serve did not start:\n{log.read().decode(errors='replace')}")
                else:
                    time.sleep(0.1)
            server = f"http://{grpc}"
            for session, hyp in [("v7", "hyp.model-v7.de.txt"), ("fallback", "hyp.fallback-dictionary.de.txt")]:
                subprocess.run([str(mtgauge), "send", "--server", server, "--session", session, "--create", "--refset", "ferry",
                                "--ids", str(demo / "ids.txt"), "--hyp", str(demo / hyp)], check=True, capture_output=True, timeout=120)
            run = f"daemon{os.getpid()}"

            def ours():
                return [b for b in notes.bodies if any(a["labels"].get("run") == run for a in b.get("alerts", []))]

            deadline = time.monotonic() + 40
            while not any(b["status"] == "firing" for b in ours()) and time.monotonic() < deadline:
                time.sleep(0.2)
            firing = [b for b in ours() if b["status"] == "firing"]
            assert firing, f"no firing notification: {notes.bodies}"
            [a] = firing[0]["alerts"]
            assert a["labels"]["alertname"] == "worse-than-production" and a["labels"]["session"] == "fallback", a
            assert a["labels"]["severity"] == "warning" and a["labels"]["metric"] == "bleu", a
            assert "proxy" in a["annotations"]["description"], a
            # The fallback session recovers: production-quality output fills its window (1000
            # segments), the drop is gone, the alert resolves at Alertmanager.
            for k in range(4):
                subprocess.run([str(mtgauge), "send", "--server", server, "--session", "fallback", "--producer", f"recover-{k}",
                                "--ids", str(demo / "ids.txt"), "--hyp", str(demo / "hyp.model-v7.de.txt")],
                               check=True, capture_output=True, timeout=120)
            deadline = time.monotonic() + 40
            while not any(b["status"] == "resolved" for b in ours()) and time.monotonic() < deadline:
                time.sleep(0.2)
            resolved = [b for b in ours() if b["status"] == "resolved"]
            assert resolved, f"no resolved notification: {ours()}"
            [r] = resolved[0]["alerts"]
            assert r["labels"] == a["labels"] and r["startsAt"] == a["startsAt"] and r["endsAt"] > r["startsAt"], (a, r)
        finally:
            srv.terminate()
            try:
                srv.wait(timeout=20)
            except subprocess.TimeoutExpired:
                srv.kill()
            log.close()
