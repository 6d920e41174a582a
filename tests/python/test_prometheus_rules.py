"""The Prometheus rule files of deploy/prometheus, checked and unit-tested with promtool.

  * `promtool check rules` on every rule file (the production files and the test-only ones
    under deploy/prometheus/tests/rules/), `promtool check config` on the example configuration
    (which also checks the rule files it names);
  * `promtool test rules` on every test file deploy/prometheus/tests/*.yml. Their expected
    values are worked out by hand in their comments (two replicas summed, zero denominators,
    windows; each alert firing and not firing, including the thin-traffic guard);
  * structural checks that promtool cannot make: every alert has a summary and a description
    that calls the metric a proxy, every alert is tested both firing and not firing, the
    recorded names follow level:metric:operations, and the 15m, 1h and since-start rule groups
    are the same rules over different windows.

promtool is found through PROMTOOL_BIN or PATH; without it every test here FAILS (never skips).

Outside facts used here, with their sources:
  * `promtool check rules FILE...`, `promtool check config FILE`, `promtool test rules FILE...`
    and their exit status 0 on success: Prometheus documentation "Unit testing for rules" and
    `promtool --help` of Prometheus 2.42.0 (Debian package prometheus 2.42.0+ds), the version
    installed here.
  * The naming form level:metric:operations, "operations newest first", "ratio" for a division:
    Prometheus documentation, "Recording rules" best practices (prometheus.io/docs/practices/rules).
"""

import os
import re
import subprocess
from pathlib import Path

import pytest

from mtg_helpers import REPO, require_tool

PROM_DIR = REPO / "deploy" / "prometheus"
TESTS_DIR = PROM_DIR / "tests"
RULES = PROM_DIR / "mtgauge-rules.yml"
ALERTS = PROM_DIR / "mtgauge-alerts.yml"
THRESHOLDS = PROM_DIR / "mtgauge-thresholds.yml"
# The score alerts, rendered by `mtgauge rules` from the example [[alert]] rules (checked to be
# up to date by test_rendered_rules.py).
RENDERED = PROM_DIR / "mtgauge-alert-rules.yml"
EXAMPLE_CONFIG = PROM_DIR / "prometheus.example.yml"

EXPECTED_ALERTS = {
    "MtgaugeUnknownSegmentsHigh", "MtgaugeNoScoredTraffic",
    "MtgaugeRefsetDigestMismatch", "MtgaugeTargetDown",
}


def promtool() -> str:
    return str(require_tool("promtool", "PROMTOOL_BIN", "these tests"))


def run_promtool(*args, cwd=None):
    proc = subprocess.run([promtool(), *map(str, args)], capture_output=True, text=True,
                          timeout=120, cwd=cwd)
    return proc, proc.stdout + proc.stderr


def rule_files():
    files = sorted(p for p in PROM_DIR.glob("*.yml") if p != EXAMPLE_CONFIG)
    files += sorted((TESTS_DIR / "rules").glob("*.yml"))
    return files


def promtool_test_files():
    return sorted(TESTS_DIR.glob("*.yml"))


def test_expected_files_exist():
    for f in (RULES, ALERTS, THRESHOLDS, RENDERED, EXAMPLE_CONFIG):
        assert f.is_file(), f"missing {f}"
    assert set(rule_files()) >= {RULES, ALERTS, THRESHOLDS, RENDERED}
    assert promtool_test_files(), f"no promtool test files in {TESTS_DIR}"


@pytest.mark.parametrize("path", rule_files(), ids=lambda p: str(p.relative_to(PROM_DIR)))
def test_promtool_check_rules(path):
    proc, out = run_promtool("check", "rules", path)
    assert proc.returncode == 0, out
    assert "SUCCESS" in out, out


def test_promtool_check_example_config():
    proc, out = run_promtool("check", "config", EXAMPLE_CONFIG)
    assert proc.returncode == 0, out
    # The example loads the four production rule files (their paths are relative to it).
    for f in (RULES, THRESHOLDS, ALERTS, RENDERED):
        assert f"Checking {f.name}" in out or f"Checking {f}" in out, out


@pytest.mark.parametrize("path", promtool_test_files(), ids=lambda p: p.name)
def test_promtool_test_rules(path):
    # Test files name their rule files relative to themselves.
    proc, out = run_promtool("test", "rules", path, cwd=TESTS_DIR)
    assert proc.returncode == 0, out
    assert "FAILED" not in out and "SUCCESS" in out, out


# ---------------------------------------------------------------------------
# structure


def blocks(text, kind):
    """{name: [text of each rule so named]} for the `- alert:` or `- record:` rules of a file."""
    starts = list(re.finditer(r"^[ \t]*- (alert|record): (\S+)[ \t]*$", text, re.M))
    bounds = sorted([m.start() for m in starts] + [len(text)]
                    + [m.start() for m in re.finditer(r"^[ \t]*- name: ", text, re.M)])
    out = {}
    for m in starts:
        end = next(b for b in bounds if b > m.start())
        if m.group(1) == kind:
            out.setdefault(m.group(2), []).append(text[m.start():end])
    return out


def groups(text):
    """{group name: its text} of a rule file."""
    parts = re.split(r"^  - name: (\S+)[ \t]*\n", text, flags=re.M)
    return {parts[i]: parts[i + 1] for i in range(1, len(parts), 2)}


def test_alerts_have_proxy_annotations():
    alerts = blocks(ALERTS.read_text(encoding="utf-8"), "alert")
    assert set(alerts) == EXPECTED_ALERTS, sorted(alerts)
    for name, [body] in alerts.items():
        assert re.search(r"^\s+summary:", body, re.M), f"{name}: no summary"
        m = re.search(r"^\s+description: >-\n((?:\s{12,}.*\n?)+)", body, re.M)
        assert m, f"{name}: no folded description"
        description = " ".join(m.group(1).split())
        assert "proxy" in description or "proxies" in description, (
            f"{name}: the description does not say the metric is a proxy: {description}")
        assert re.search(r"^\s+severity: \w+", body, re.M), f"{name}: no severity label"
        assert re.search(r"^\s+for: \d+[smh]\s*$", body, re.M), f"{name}: no for:"


def test_every_alert_tested_firing_and_not_firing():
    text = "\n".join(p.read_text(encoding="utf-8") for p in promtool_test_files())
    for name in EXPECTED_ALERTS:
        quiet = re.search(rf"alertname: {name}\n\s+exp_alerts: \[\]", text)
        firing = re.search(rf"alertname: {name}\n\s+exp_alerts:\n\s+- exp_labels:", text)
        assert quiet, f"no promtool test where {name} does not fire"
        assert firing, f"no promtool test where {name} fires"


def test_recorded_names_follow_the_convention():
    for f in (RULES, ALERTS):
        for name in blocks(f.read_text(encoding="utf-8"), "record"):
            assert re.fullmatch(r"[a-z]+(_[a-z]+)*:mtgauge_[a-z0-9_]+:[a-z0-9_]+", name), (
                f"{f.name}: {name} is not level:metric:operations")
            level = name.split(":")[0]
            assert level.split("_")[0] == "session", f"{name}: level without session"
    for name in blocks(THRESHOLDS.read_text(encoding="utf-8"), "record"):
        assert re.fullmatch(r"mtgauge:[a-z_]+", name), f"{THRESHOLDS.name}: {name}"


def test_window_groups_are_the_same_rules():
    g = groups(RULES.read_text(encoding="utf-8"))
    assert set(g) == {"mtgauge-fleet-since-start", "mtgauge-fleet-15m", "mtgauge-fleet-1h",
                      "mtgauge-fleet-external"}, sorted(g)
    w15, w1h, start = g["mtgauge-fleet-15m"], g["mtgauge-fleet-1h"], g["mtgauge-fleet-since-start"]
    # The separator line, and the comment block that opens the next group.
    strip = lambda s: re.sub(r"\n\s*# -+(\n\s*#.*)*\s*$", "", s.rstrip())  # noqa: E731
    # 1h is 15m with the window replaced.
    assert strip(w15.replace("15m", "1h")) == strip(w1h)
    # Since start is 15m on the raw counters.
    as_start = re.sub(r"increase\((\w+)\[15m\]\)", r"\1", w15)
    as_start = as_start.replace(":ratio_increase15m", ":ratio").replace(":increase15m", ":sum")
    as_start = as_start.replace("session_outcome:mtgauge_segments:sum",
                                "session_outcome:mtgauge_segments_total:sum")
    assert strip(as_start) == strip(start)
