"""CLI error contract of `mtgauge score`: exit code 2, nothing on stdout, and a
single line on stderr that names the offending file and (where there is one)
the line number."""

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
    out = mtgauge.score_json(["--ref", ref, "--hyp", hyp, "--tokenize", "whitespace"])
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
