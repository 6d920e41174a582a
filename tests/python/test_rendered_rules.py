"""`mtgauge rules`: the [[alert]] rules of a serve config rendered as Prometheus rules, checked with
`promtool check rules` and unit-tested with `promtool test rules` on series built here.

The input series are the counters two replicas export (mtgauge_replicate_*_total with a
`replicate` label, mtgauge_segments_total, mtgauge_session_info), with values chosen so that every
replicate score is known by hand: BLEU with every n-gram precision p and as many hypothesis as
reference tokens is 100 p (brevity penalty 1; Papineni et al. 2002, the geometric mean of equal
precisions is that precision); chrF over one order with as many hypothesis as reference n-grams
has P = R = p, hence F = 100 p for any beta (Popović 2015). The upper bound each rule judges is
PromQL's quantile(0.975) over the replicate scores: rank 0.975 (N - 1), 0-based, interpolated
linearly (Prometheus documentation, "Aggregation operators"; from memory; the same rank rule is
checked against a live Prometheus in test_fleet.py). With the four replicate scores 40, 42, 44,
46: rank 2.925, bound 44 + 0.925 x 2 = 45.85.

Outside facts, with their sources: the `promtool test rules` file format (rule_files,
evaluation_interval, tests[].interval / input_series / alert_rule_test with eval_time, alertname,
exp_alerts[].exp_labels / exp_annotations), series values 'a+bxn' and 'axn' (n + 1 samples):
Prometheus documentation "Unit testing for rules" (from memory), run with promtool of Prometheus
2.42.0 (Debian package prometheus 2.42.0+ds). The ALERTS series (labels alertname, alertstate and
the alert's labels) that the rendered hysteresis reads: Prometheus documentation "Alerting rules"
(from memory).
"""

import subprocess

import pytest

from mtg_helpers import REPO, require_binary, require_tool

EXAMPLE_RULES = REPO / "deploy" / "alerts" / "mtgauge-alert-rules.example.toml"
SHIPPED = REPO / "deploy" / "prometheus" / "mtgauge-alert-rules.yml"

REPLICAS = ("a", "b")
PHASE = 10  # minutes per phase; 11 samples each (x10)
ORDERS = ("1", "2", "3", "4")
NGRAMS = 500  # per replica, replicate and order

# The rules under test. Summaries are given so that the expected annotations are known here.
CONFIG = """
[[alert]]
name = "floor-all"
labels = { probe = "ferry-notices" }
window = "all"
when = "below"
threshold = 47
min_segments = 100
for_seconds = 0
clear_margin = 1.0
[alert.annotations]
summary = "ferry BLEU below 47"

[[alert]]
name = "worse"
session = "cand"
window = "all"
when = "drop"
baseline = "base"
points = 3
min_segments = 100
for_seconds = 0
clear_margin = 1.0
[alert.annotations]
summary = "candidate worse than base"

[[alert]]
name = "floor-15m"
session = "cand15"
window = "15m"
when = "below"
threshold = 47
min_segments = 100
for_seconds = 120
severity = "page"
[alert.extra_labels]
team = "ferry-mt"
[alert.annotations]
summary = "cand15 BLEU below 47 in 15m"

[[alert]]
name = "chrf-floor"
session = "cand"
metric = "chrf"
window = "all"
when = "below"
threshold = 47
min_segments = 100
for_seconds = 0
clear_margin = 1.0
[alert.annotations]
summary = "candidate chrF below 47"

[[alert]]
name = "base-floor"
session = "base"
window = "all"
when = "below"
threshold = 40
for_seconds = 0
[alert.annotations]
summary = "base BLEU below 40"

[[alert]]
name = "copies"
labels = { probe = "ferry-notices" }
when = "flag-rate"
guard = "copy"
threshold = 5
min_segments = 100
for_seconds = 0
clear_margin = 1.0
[alert.annotations]
summary = "copy rate above 5%"

[[alert]]
name = "recent-floor"
session = "cand"
when = "below"
threshold = 47

[[alert]]
name = "slide"
session = "base"
when = "decline"
points = 2
"""

DESCRIPTION = {m: f"{m} is an automatic proxy for translation quality: look at the session's recent "
                  "output and at what changed (model, input, references) before concluding anything."
               for m in ("BLEU", "chrF")}


def measured(v):
    return f"upper bound of the 95% interval {v:.2f} (Prometheus, over the exported replicates)"


def phases(values):
    """Series values: one constant per phase, PHASE minutes each ('v x PHASE' per phase)."""
    return " ".join(f"{v:g}x{PHASE}" for v in values)


def series(name, labels, values):
    text = ", ".join(f'{k}="{v}"' for k, v in labels.items())
    return f"      - series: '{name}{{{text}}}'\n        values: '{values}'\n"


Z95 = 1.959963984540054  # standard normal 0.975 quantile (common practice, to 16 digits)


def wilson_low(flagged, n, z=Z95):
    """Lower bound of the Wilson (1927) score interval of flagged / n, in percent: (p + z^2/2n -
    z sqrt(p(1 - p)/n + z^2/4n^2)) / (1 + z^2/n) (E. B. Wilson, "Probable inference, the law of
    succession, and statistical inference", JASA 22, 1927; the formula from memory)."""
    p = flagged / n
    return 100 * (p + z * z / (2 * n) - z * (p * (1 - p) / n + z * z / (4 * n * n)) ** 0.5) / (1 + z * z / n)


def guard_session(session, checked, undecided, flagged, other_flagged):
    """Guard counters of `session` on both replicas, per phase (totals split evenly): items
    checked, the copy guard's undecided and flagged items, and the length guard's flags (which
    a copy rule must not read)."""
    out = []
    for inst in REPLICAS:
        out.append(series("mtgauge_guard_checked_total", {"session": session, "instance": inst}, phases([c / 2 for c in checked])))
        for guard, und, flg in (("copy", undecided, flagged), ("length", [0] * 3, other_flagged)):
            labels = {"session": session, "guard": guard, "instance": inst}
            out.append(series("mtgauge_guard_undecided_total", labels, phases([u / 2 for u in und])))
            out.append(series("mtgauge_guard_flagged_total", labels, phases([f / 2 for f in flg])))
    return out


def bleu_session(session, precisions_by_phase):
    """Replicate BLEU counters of `session`: replicate r has every precision
    precisions_by_phase[k][r] in phase k, split evenly over the two replicas; "all" window."""
    out = []
    for rep in range(len(precisions_by_phase[0])):
        for inst in REPLICAS:
            base = {"session": session, "replicate": str(rep), "instance": inst}
            for order in ORDERS:
                labels = {**base, "order": order}
                out.append(series("mtgauge_replicate_bleu_matches_total", labels,
                                  phases([p[rep] * NGRAMS for p in precisions_by_phase])))
                out.append(series("mtgauge_replicate_bleu_ngrams_total", labels, phases([NGRAMS] * 3)))
            for fam in ("mtgauge_replicate_hypothesis_tokens_total", "mtgauge_replicate_reference_tokens_total"):
                out.append(series(fam, base, phases([4 * NGRAMS] * 3)))
    return out


def test_rendered_rules_pass_promtool(tmp_path):
    config = tmp_path / "serve.toml"
    config.write_text(CONFIG, encoding="utf-8")
    rules = tmp_path / "rendered.yml"
    proc = subprocess.run([str(require_binary()), "rules", "--config", str(config), "--output", str(rules)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    # The two rules Prometheus cannot evaluate are named, with the reason.
    assert "not rendered (daemon only): recent-floor: the `recent` window" in proc.stderr, proc.stderr
    assert "not rendered (daemon only): slide: a `decline` rule" in proc.stderr
    assert "6 of 8 rules rendered" in proc.stderr
    text = rules.read_text(encoding="utf-8")
    assert "# Not rendered (daemon only): slide" in text

    promtool = str(require_tool("promtool", "PROMTOOL_BIN", "these tests"))
    check = subprocess.run([promtool, "check", "rules", str(rules)], capture_output=True, text=True, timeout=60)
    assert check.returncode == 0 and "SUCCESS" in check.stdout + check.stderr, check.stdout + check.stderr

    # Candidate: replicate precisions 0.40 .. 0.46 (bound 45.85 < 47: fires), then 0.015 higher
    # (bound 47.35: below 47 + 1, still firing), then 0.03 higher (bound 48.85: resolves).
    cand = [[0.40 + 0.02 * r + shift for r in range(4)] for shift in (0.0, 0.015, 0.03)]
    base = [[0.50] * 4] * 3
    s = bleu_session("cand", cand) + bleu_session("base", base) + bleu_session("thin", cand)
    # chrF of the candidate: one character order, as many hypothesis as reference n-grams.
    for rep in range(4):
        for inst in REPLICAS:
            labels = {"session": "cand", "metric": "chrf", "replicate": str(rep), "kind": "chars", "order": "1", "instance": inst}
            s.append(series("mtgauge_replicate_chrf_matches_total", labels, phases([p[rep] * NGRAMS for p in cand])))
            s.append(series("mtgauge_replicate_chrf_hypothesis_ngrams_total", labels, phases([NGRAMS] * 3)))
            s.append(series("mtgauge_replicate_chrf_reference_ngrams_total", labels, phases([NGRAMS] * 3)))
    # A 15-minute window: counters growing at constant rates, so increase() gives the same ratios.
    for rep in range(4):
        for inst in REPLICAS:
            base_l = {"session": "cand15", "replicate": str(rep), "instance": inst}
            for order in ORDERS:
                labels = {**base_l, "order": order}
                s.append(series("mtgauge_replicate_bleu_matches_total", labels, f"0+{(0.40 + 0.02 * rep) * 50:g}x32"))
                s.append(series("mtgauge_replicate_bleu_ngrams_total", labels, "0+50x32"))
            for fam in ("mtgauge_replicate_hypothesis_tokens_total", "mtgauge_replicate_reference_tokens_total"):
                s.append(series(fam, base_l, "0+200x32"))
    # Scored segments: thin has fewer than min_segments (25 on each replica).
    for sess, per in (("cand", 300), ("base", 300), ("thin", 25)):
        for inst in REPLICAS:
            s.append(series("mtgauge_segments_total", {"session": sess, "outcome": "scored", "instance": inst}, f"{per}x32"))
    for inst in REPLICAS:
        s.append(series("mtgauge_segments_total", {"session": "cand15", "outcome": "scored", "instance": inst}, "0+10x32"))
        for sess, probe in (("cand", "ferry-notices"), ("thin", "ferry-notices"), ("base", "other")):
            s.append(series("mtgauge_session_info", {"session": sess, "probe": probe, "instance": inst}, "1x32"))

    # Guard counters. cand: the copy guard decided on 500, 2000, 4000 items (checked minus
    # undecided) and flagged 60, 110, 150: Wilson lower bounds 9.44% (fires above 5), 4.58%
    # (between 5 - 1 and 5: still firing), 3.20% (resolved); its length guard flags half of
    # everything (not the copy rule's business). thin: half its items copied, but 40 decided
    # for min_segments 100. base: copies as much, but fails the probe label selector.
    s += guard_session("cand", [600, 2200, 4400], [100, 200, 400], [60, 110, 150], [300, 1100, 2200])
    s += guard_session("thin", [40, 40, 40], [0, 0, 0], [20, 20, 20], [0, 0, 0])
    s += guard_session("base", [600, 2200, 4400], [100, 200, 400], [300, 1000, 2000], [0, 0, 0])
    copies = [wilson_low(60, 500), wilson_low(110, 2000), wilson_low(150, 4000)]
    assert copies[0] > 5 and 4 < copies[1] <= 5 and copies[2] <= 4, copies
    flag_description = ("The copy guard flags likely broken output by a fixed rule, without a reference: look at "
                        "the session's flagged items (per-item verdicts) and at what changed (model, input) before "
                        "concluding anything.")

    def alert(name, t, session=None, metric="bleu", value=None, summary=None, severity="warning", extra=None):
        exp = ""
        if session is not None:
            labels = {"session": session, "severity": severity, "metric": metric, **(extra or {})}
            if metric.startswith("guard:"):
                ann = {"summary": summary, "description": flag_description,
                       "measured": f"lower bound of the 95% Wilson interval of the flagged share {value:.2f}% "
                                   "(Prometheus, over the replicas' summed guard counters)"}
            else:
                ann = {"summary": summary, "measured": measured(value),
                       "description": DESCRIPTION["BLEU" if metric == "bleu" else "chrF"]}
            exp = ("          - exp_labels:\n"
                   + "".join(f'              {k}: "{v}"\n' for k, v in labels.items())
                   + "            exp_annotations:\n"
                   + "".join(f'              {k}: "{v}"\n' for k, v in ann.items()))
        return (f"      - eval_time: {t}m\n        alertname: {name}\n"
                + ("        exp_alerts:\n" + exp if exp else "        exp_alerts: []\n"))

    checks = [
        # Phase 1: below (bound 45.85), and the drop: differences -10 .. -4, bound -4.15 < -3.
        alert("floor-all", 5, "cand", value=45.85, summary="ferry BLEU below 47"),
        alert("worse", 5, "cand", value=-4.15, summary="candidate worse than base"),
        alert("chrf-floor", 5, "cand", metric="chrf", value=45.85, summary="candidate chrF below 47"),
        # Phase 2: back above the limits but within clear_margin: still firing.
        alert("floor-all", 16, "cand", value=47.35, summary="ferry BLEU below 47"),
        alert("worse", 16, "cand", value=-2.65, summary="candidate worse than base"),
        alert("chrf-floor", 16, "cand", metric="chrf", value=47.35, summary="candidate chrF below 47"),
        # Phase 3: past the margin: resolved.
        alert("floor-all", 28),
        alert("worse", 28),
        alert("chrf-floor", 28),
        # The 15-minute window: pending first (for: 120s), then firing.
        alert("floor-15m", 2),
        alert("floor-15m", 10, "cand15", value=45.85, summary="cand15 BLEU below 47 in 15m", severity="page", extra={"team": "ferry-mt"}),
        # flag-rate: fires, holds within the clear margin, resolves (phases as above).
        alert("copies", 5, "cand", metric="guard:copy", value=copies[0], summary="copy rate above 5%"),
        alert("copies", 16, "cand", metric="guard:copy", value=copies[1], summary="copy rate above 5%"),
        alert("copies", 28),
        alert("base-floor", 10),
    ]
    test = tmp_path / "rendered_test.yml"
    test.write_text(
        f"rule_files:\n  - {rules.name}\nevaluation_interval: 1m\ntests:\n  - interval: 1m\n    input_series:\n"
        + "".join(s) + "    alert_rule_test:\n" + "".join(checks),
        encoding="utf-8")
    run = subprocess.run([promtool, "test", "rules", test.name], capture_output=True, text=True, timeout=120, cwd=tmp_path)
    out = run.stdout + run.stderr
    assert run.returncode == 0 and "SUCCESS" in out, out[-6000:]
    # `thin` scores as low as the candidate and matches the label selector, but has 50 scored
    # segments for min_segments 100: the exp_alerts above list only `cand` for floor-all, and
    # promtool fails on any alert not listed.


def test_rules_refuses_a_config_without_alert_rules(tmp_path):
    config = tmp_path / "serve.toml"
    config.write_text('listen = "127.0.0.1:0"\n', encoding="utf-8")
    proc = subprocess.run([str(require_binary()), "rules", "--config", str(config)], capture_output=True, text=True, timeout=60)
    assert proc.returncode != 0 and "no [[alert]] rules" in proc.stderr, proc.stderr
    config.write_text('[[alert]]\nname = "x"\nsession = "s"\nwhen = "below"\nthreshold = 40\nwindow = "15 min"\n', encoding="utf-8")
    proc = subprocess.run([str(require_binary()), "rules", "--config", str(config)], capture_output=True, text=True, timeout=60)
    assert proc.returncode != 0 and "alert rule 'x': window '15 min'" in proc.stderr, proc.stderr


def test_shipped_rule_file_is_the_rendering_of_the_example(tmp_path):
    """deploy/prometheus/mtgauge-alert-rules.yml (loaded by prometheus.example.yml in place of
    hand-written score thresholds) is exactly what `mtgauge rules` makes of the example rules:
    the daemon and Prometheus judge the same definitions."""
    out = tmp_path / "rendered.yml"
    proc = subprocess.run([str(require_binary()), "rules", "--config", str(EXAMPLE_RULES), "--output", str(out)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert "3 of 4 rules rendered" in proc.stderr, proc.stderr
    assert "not rendered (daemon only): production-chrf-decline" in proc.stderr, proc.stderr
    assert SHIPPED.read_text(encoding="utf-8") == out.read_text(encoding="utf-8"), (
        f"{SHIPPED} is out of date: run `mtgauge rules --config {EXAMPLE_RULES.relative_to(REPO)} "
        f"--output {SHIPPED.relative_to(REPO)}`")
    for alert in ("candidate-bleu-floor", "candidate-worse-than-production", "candidate-copies-source"):
        assert f"- alert: {alert}\n" in out.read_text(encoding="utf-8"), alert
