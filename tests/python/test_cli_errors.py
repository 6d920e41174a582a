"""CLI error contract of `mtgauge score`: exit code 2, nothing on stdout, and a
single line on stderr that names the offending file and (where there is one)
the line number. The same contract for bad `--metric` specs, on every command
that takes them (`score`, `send`, `load`): the line says what is wrong and, for a
key or value that cannot be read, lists the metric's valid keys."""

import re

import pytest

from mtg_helpers import write_lines


def assert_usage_error(proc, tmp_path, filename, line=None):
    """filename / line may be tuples of acceptable alternatives (for a line-count
    mismatch either stream may be named, with its last or first unmatched line)."""
    names = filename if isinstance(filename, tuple) else (filename,)
    nums = line if isinstance(line, tuple) else (() if line is None else (line,))
    err = proc.stderr.decode("utf-8", "replace")
    assert proc.returncode == 2, f"exit code {proc.returncode}, stderr: {err!r}"
    assert proc.stdout == b"", f"stdout must be empty, got {proc.stdout[:200]!r}"
    lines = [l for l in err.split("\n") if l.strip()]
    assert len(lines) == 1, f"expected one line on stderr, got {len(lines)}: {err!r}"
    assert any(n in err for n in names), f"stderr does not name {' or '.join(names)}: {err!r}"
    # the temporary directory's name contains digits: leave it out of the search
    bare = err.replace(str(tmp_path), "<tmp>")
    if nums:
        assert any(re.search(rf"(?<![0-9]){n}(?![0-9])", bare) for n in nums), (
            f"stderr does not name line {' or '.join(map(str, nums))}: {err!r}")


def good_files(tmp_path):
    hyp = write_lines(tmp_path / "hyp.txt", ["a b c d", "e f g h", "i j k l"])
    ref = write_lines(tmp_path / "ref.txt", ["a b c d", "e f x h", "i j k m"])
    return hyp, ref


def test_valid_input_is_accepted(mtgauge, tmp_path):
    # control for the cases below: the same files, intact, score fine
    hyp, ref = good_files(tmp_path)
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace"])
    assert out["segments"] == 3


def test_reference_has_more_lines(mtgauge, tmp_path):
    hyp = write_lines(tmp_path / "hyp_short.txt", ["a b c d", "e f g h"])
    ref = write_lines(tmp_path / "ref_long.txt", ["a b c d", "e f g h", "i j k l"])
    proc = mtgauge.run(["score", "--ref", ref, "--hyp", hyp, "--json"])
    # line 3 of ref_long.txt has no hypothesis (hyp_short.txt ends after line 2)
    assert_usage_error(proc, tmp_path, ("ref_long.txt", "hyp_short.txt"), (2, 3))


def test_hypothesis_has_more_lines(mtgauge, tmp_path):
    hyp = write_lines(tmp_path / "hyp_long.txt", ["a b c d", "e f g h", "i j k l", "m n"])
    r1 = write_lines(tmp_path / "ref_a.txt", ["a b c d", "e f g h", "i j k l", "m n"])
    r2 = write_lines(tmp_path / "ref_b.txt", ["a b c d", "e f g h", "i j k l"])
    proc = mtgauge.run(["score", "--ref", r1, "--ref", r2, "--hyp", hyp, "--json"])
    # the second reference stream ends after line 3; line 4 is unmatched
    assert_usage_error(proc, tmp_path, ("ref_b.txt", "hyp_long.txt"), (3, 4))


def test_invalid_utf8_in_hypothesis(mtgauge, tmp_path):
    _, ref = good_files(tmp_path)
    hyp = tmp_path / "hyp_bad.txt"
    hyp.write_bytes(b"a b c d\ne f \xff h\ni j k l\n")
    proc = mtgauge.run(["score", "--ref", ref, "--hyp", hyp, "--json"])
    assert_usage_error(proc, tmp_path, "hyp_bad.txt", 2)


def test_invalid_utf8_in_reference(mtgauge, tmp_path):
    hyp, _ = good_files(tmp_path)
    ref = tmp_path / "ref_bad.txt"
    # a truncated 3-byte sequence on line 3
    ref.write_bytes(b"a b c d\ne f x h\ni j \xe2\x82 m\n")
    proc = mtgauge.run(["score", "--ref", ref, "--hyp", hyp, "--json"])
    assert_usage_error(proc, tmp_path, "ref_bad.txt", 3)


def test_missing_reference_file(mtgauge, tmp_path):
    hyp, _ = good_files(tmp_path)
    missing = tmp_path / "no_such_ref.txt"
    proc = mtgauge.run(["score", "--ref", missing, "--hyp", hyp, "--json"])
    assert_usage_error(proc, tmp_path, "no_such_ref.txt")


def test_missing_hypothesis_file(mtgauge, tmp_path):
    _, ref = good_files(tmp_path)
    missing = tmp_path / "no_such_hyp.txt"
    proc = mtgauge.run(["score", "--ref", ref, "--hyp", missing, "--json"])
    assert_usage_error(proc, tmp_path, "no_such_hyp.txt")


@pytest.mark.parametrize("bad_line", [
    '{"id": "2", "refs": ["e f g h"',   # truncated JSON
    '{"id": "2", "refs": "e f g h"}',   # refs is not a list
    'not json at all',
])
def test_malformed_jsonl_references(mtgauge, tmp_path, bad_line):
    hyp, _ = good_files(tmp_path)
    refs = tmp_path / "refs_bad.jsonl"
    refs.write_text('{"id": "1", "refs": ["a b c d"]}\n' + bad_line + "\n"
                    '{"id": "3", "refs": ["i j k l"]}\n', encoding="utf-8")
    proc = mtgauge.run(["score", "--ref", refs, "--hyp", hyp, "--json"])
    assert_usage_error(proc, tmp_path, "refs_bad.jsonl", 2)


def test_jsonl_record_count_mismatch(mtgauge, tmp_path):
    hyp, _ = good_files(tmp_path)
    refs = tmp_path / "refs_two.jsonl"
    refs.write_text('{"id": "1", "refs": ["a b c d"]}\n{"id": "2", "refs": ["e f g h", "e f"]}\n',
                    encoding="utf-8")
    proc = mtgauge.run(["score", "--ref", refs, "--hyp", hyp, "--json"])
    # hypothesis line 3 has no reference record
    assert_usage_error(proc, tmp_path, ("refs_two.jsonl", "hyp.txt"), (2, 3))


def test_invalid_utf8_on_stdin(mtgauge, tmp_path):
    _, ref = good_files(tmp_path)
    proc = mtgauge.run(["score", "--ref", ref, "--hyp", "-", "--json"],
                       input_bytes=b"a b c d\n\xc3\x28 e f\ni j k l\n")
    err = proc.stderr.decode("utf-8", "replace")
    assert proc.returncode == 2 and proc.stdout == b"", (proc.returncode, err)
    assert len([l for l in err.split("\n") if l.strip()]) == 1, err
    bare = err.replace(str(tmp_path), "<tmp>")
    assert re.search(r"(?<![0-9])2(?![0-9])", bare), f"stderr does not name line 2: {err!r}"


def test_binary_is_present(mtgauge_bin):
    # Fails (never skips) when the binary has not been built.
    from mtg_helpers import require_binary

    assert require_binary() == mtgauge_bin


# ---------------------------------------------------------------------------
# --metric specs

BLEU_KEYS = "(valid keys: order, ref-length, smoothing, epsilon)"
CHRF_KEYS = "(valid keys: chars, words, beta)"

# (id, --metric specs, substrings the one stderr line must contain)
METRIC_SPEC_ERRORS = [
    # a key the metric does not have
    ("bleu-key-chars", ["bleu:chars=4"], ["unknown key 'chars' for bleu " + BLEU_KEYS]),
    ("chrf-key-order", ["chrf:order=3"], ["unknown key 'order' for chrf " + CHRF_KEYS]),
    ("chrf++-key-epsilon", ["chrf++:epsilon=0.1"], ["unknown key 'epsilon' for chrf++ " + CHRF_KEYS]),
    ("chrf-key-ref-length", ["chrf:ref-length=closest"], ["unknown key 'ref-length' for chrf " + CHRF_KEYS]),
    # a value that cannot be read
    ("bleu-order-not-a-number", ["bleu:order=x"], ["bleu:order", "'x'", BLEU_KEYS]),
    ("bleu-epsilon-not-a-number", ["bleu:epsilon=abc"], ["bleu:epsilon", "'abc'", BLEU_KEYS]),
    ("bleu-smoothing-unknown", ["bleu:smoothing=foo"], ["bleu:smoothing", "'foo'", BLEU_KEYS]),
    ("bleu-ref-length-unknown", ["bleu:ref-length=longest"], ["bleu:ref-length", "'longest'", BLEU_KEYS]),
    ("chrf-beta-not-a-number", ["chrf:beta=abc"], ["chrf:beta", "'abc'", CHRF_KEYS]),
    ("chrf++-words-not-a-number", ["chrf++:words=two"], ["chrf++:words", "'two'", CHRF_KEYS]),
    # out of range
    ("bleu-order-0", ["bleu:order=0"], ["bleu:order must be between 1 and 8, got 0"]),
    ("bleu-order-9", ["bleu:order=9"], ["bleu:order must be between 1 and 8, got 9"]),
    ("bleu-epsilon-0", ["bleu:epsilon=0"], ["bleu:epsilon must be a positive number, got 0"]),
    ("chrf-chars-0", ["chrf:chars=0"], ["chrf:chars must be between 1 and 10, got 0"]),
    ("chrf-chars-11", ["chrf:chars=11"], ["chrf:chars must be between 1 and 10, got 11"]),
    ("chrf-words-5", ["chrf:words=5"], ["chrf:words must be between 0 and 4, got 5"]),
    ("chrf++-words-0", ["chrf++:words=0"], ["chrf++:words must be between 1 and 4, got 0"]),
    ("chrf++-beta-negative", ["chrf++:beta=-1"], ["chrf++:beta must be a positive number, got -1"]),
    # the same metric twice (each metric once, with all its parameters)
    ("bleu-twice", ["bleu", "bleu:order=2"], ["metric bleu named twice ("]),
    ("chrf-twice", ["chrf:beta=1", "chrf:beta=3"], ["metric chrf named twice ("]),
    ("chrf++-twice", ["bleu", "chrf++", "chrf++:words=1"], ["metric chrf++ named twice ("]),
    # a metric that does not exist
    ("unknown-ter", ["ter"], ["unknown metric 'ter' (choose from bleu, chrf, chrf++)"]),
    ("unknown-chrf+", ["bleu", "chrf+:chars=6"], ["unknown metric 'chrf+' (choose from bleu, chrf, chrf++)"]),
]


def metric_command(command, tmp_path, specs):
    """argv of `command` with the given --metric specs; everything else about it is valid, and
    the server address (port 1 on loopback) is never reached: the specs are refused first."""
    hyp, ref = good_files(tmp_path)
    metric_args = [a for spec in specs for a in ("--metric", spec)]
    if command == "score":
        return ["score", "--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace", "--json", *metric_args]
    if command == "send":
        return ["send", "--server", "http://127.0.0.1:1", "--session", "spec-errors", "--hyp", hyp,
                "--create", "--refset", "ferry", "--json", *metric_args]
    assert command == "load"
    return ["load", "--server", "http://127.0.0.1:1", "--seconds", "1", "--json", *metric_args]


def assert_spec_error(proc, needles):
    err = proc.stderr.decode("utf-8", "replace")
    assert proc.returncode == 2, f"exit code {proc.returncode}, stderr: {err!r}"
    assert proc.stdout == b"", f"stdout must be empty, got {proc.stdout[:200]!r}"
    lines = [l for l in err.split("\n") if l.strip()]
    assert len(lines) == 1, f"expected one line on stderr, got {len(lines)}: {err!r}"
    for needle in needles:
        assert needle in lines[0], f"stderr line does not contain {needle!r}: {lines[0]!r}"


@pytest.mark.parametrize("command", ["score", "send", "load"])
@pytest.mark.parametrize("specs,needles", [c[1:] for c in METRIC_SPEC_ERRORS],
                         ids=[c[0] for c in METRIC_SPEC_ERRORS])
def test_bad_metric_spec(mtgauge, tmp_path, command, specs, needles):
    proc = mtgauge.run(metric_command(command, tmp_path, specs), timeout=30)
    assert_spec_error(proc, needles)


def test_metric_spec_controls_are_accepted(mtgauge, tmp_path):
    # control for the table above: the same keys with valid values score fine, and each
    # metric keeps its own parameters
    hyp, ref = good_files(tmp_path)
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenizer", "whitespace",
                              "--metric", "bleu:order=2,ref-length=shortest,smoothing=plus-one,epsilon=0.05",
                              "--metric", "chrf:chars=10,words=4,beta=0.5",
                              "--metric", "chrf++:chars=1,words=1,beta=3"])
    assert out["config"]["metrics"] == {
        "bleu": {"order": 2, "ref-length": "shortest", "smoothing": "plus-one", "epsilon": 0.05},
        "chrf": {"chars": 10, "words": 4, "beta": 0.5},
        "chrf++": {"chars": 1, "words": 1, "beta": 3.0},
    }
    assert len(out["bleu"]["matched"]) == 2
    assert len(out["chrf"]["chars"]["matched"]) == 10 and len(out["chrf"]["words"]["matched"]) == 4
    assert len(out["chrf++"]["chars"]["matched"]) == 1 and len(out["chrf++"]["words"]["matched"]) == 1


def test_metric_key_without_value(mtgauge, tmp_path):
    # `order` is a key bleu has; the spec lacks its `=value`. The one line must name the key
    # and must not call it unknown (which would contradict the list of valid keys).
    proc = mtgauge.run(metric_command("score", tmp_path, ["bleu:order"]))
    assert_spec_error(proc, ["order"])
    line = proc.stderr.decode("utf-8", "replace").strip()
    assert "unknown key 'order'" not in line, f"a valid key without a value called unknown: {line!r}"


def test_old_flags_are_gone(mtgauge, tmp_path):
    # the renamed interface: the flat flags of before are refused (clap usage error, exit 2)
    hyp, ref = good_files(tmp_path)
    for old in (["--metrics", "bleu"], ["--tokenize", "whitespace"], ["--lowercase"],
                ["--bleu-order", "4"], ["--ref-length", "shortest"], ["--smoothing", "none"],
                ["--epsilon", "0.1"], ["--chrf-beta", "2"], ["--chrf-char-order", "6"],
                ["--chrf-word-order", "2"]):
        proc = mtgauge.run(["score", "--ref", ref, "--hyp", hyp, "--json", *old])
        assert proc.returncode == 2 and proc.stdout == b"", (old, proc.returncode, proc.stdout[:200])
