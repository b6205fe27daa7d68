"""The safe YAML reader: line-keeping tree, refusals of dangerous or ambiguous YAML, merge and dump."""

from __future__ import annotations

import time

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lightloom.sequencer.errors import InputError
from lightloom.sequencer.lang.yamlsafe import (
    MAX_NODES,
    YMap,
    YScalar,
    YSeq,
    dump_plain,
    merge,
    parse_bytes,
    parse_text,
    read_file,
    to_plain,
)


def error_of(data: bytes) -> InputError:
    with pytest.raises(InputError) as info:
        parse_bytes(data, "f.yaml")
    return info.value


def test_tree_keeps_one_based_lines_of_keys_and_values() -> None:
    root = parse_text("a: 1\nb:\n  - x\n  - {c: 2.5}\n", "f.yaml")
    assert isinstance(root, YMap)
    assert root.entry("a").key_line == 1
    b = root.get("b")
    assert isinstance(b, YSeq) and b.line == 3
    inner = b.items[1]
    assert isinstance(inner, YMap) and inner.line == 4
    c = inner.get("c")
    assert isinstance(c, YScalar) and (c.value, c.line, c.file) == (2.5, 4, "f.yaml")


def test_duplicate_key_is_reported_at_the_second_occurrence() -> None:
    err = error_of(b"a: 1\nb: 2\na: 3\n")
    assert (err.file, err.line) == ("f.yaml", 3)
    assert "duplicate key 'a' (first at line 1)" in err.message


@pytest.mark.parametrize(
    "text",
    [
        "a: !!python/object/apply:os.system ['true']\n",
        "a: !!python/name:os.system\n",
        "a: !custom 3\n",
        "a: !!str 3\n",
        "a: !!binary aGVsbG8=\n",
        "a: !!set {x, y}\n",
        "a: ! 3\n",
        "%TAG !e! tag:example.com,2000:\n---\na: !e!thing 1\n",
    ],
)
def test_any_explicit_tag_is_refused(text: str) -> None:
    err = error_of(text.encode())
    assert "explicit YAML tag" in err.message
    assert err.line == text.count("\n")


@pytest.mark.parametrize("literal", [".nan", ".NaN", ".inf", "-.inf", "+.Inf", ".INF"])
def test_nan_and_infinities_are_refused(literal: str) -> None:
    err = error_of(f"a:\n  b: [1, {literal}]\n".encode())
    assert err.line == 2
    assert "NaN and infinities are not allowed" in err.message


def test_billion_laughs_fails_fast() -> None:
    lines = ["a: &a [lol, lol, lol, lol, lol, lol, lol, lol, lol]"]
    for prev, name in zip("abcdefgh", "bcdefghi"):
        lines.append(f"{name}: &{name} [{', '.join(['*' + prev] * 9)}]")
    start = time.perf_counter()
    err = error_of(("\n".join(lines) + "\n").encode())
    assert time.perf_counter() - start < 0.5
    assert "alias" in err.message


def test_alias_expansion_beyond_the_node_budget_is_refused() -> None:
    big = ", ".join(["x"] * 600)
    text = f"a: &a [{big}]\n" + "".join(f"k{i}: *a\n" for i in range(19))
    err = error_of(text.encode())
    assert f"more than {MAX_NODES} values" in err.message


def test_a_few_aliases_are_allowed_and_expanded() -> None:
    root = parse_text("base: &b {x: 1}\ncopy: *b\n", "f.yaml")
    assert to_plain(root) == {"base": {"x": 1}, "copy": {"x": 1}}


def test_recursive_alias_is_refused() -> None:
    assert "recursive" in error_of(b"a: &x [1, *x]\n").message


def test_deep_nesting_is_refused() -> None:
    assert "nesting deeper" in error_of(b"a: " + b"[" * 200 + b"]" * 200 + b"\n").message


def test_merge_keys_are_refused() -> None:
    err = error_of(b"a: &x {b: 1}\nc:\n  <<: *x\n")
    assert err.line == 3 and "merge keys" in err.message


@pytest.mark.parametrize("key, kind", [("1", "a number"), ("yes", "a boolean"), ("null", "null"), ("2.5", "a number")])
def test_non_text_keys_are_refused(key: str, kind: str) -> None:
    err = error_of(f"ok: 1\n{key}: x\n".encode())
    assert err.line == 2
    assert f"is read as {kind}" in err.message


def test_complex_keys_are_refused() -> None:
    assert "a key must be plain text" in error_of(b"? [a, b]\n: 1\n").message


def test_not_utf8_reports_the_line_of_the_first_bad_byte() -> None:
    err = error_of(b"a: 1\nb: ok\nc: caf\xe9\n")
    assert err.line == 3 and "not UTF-8" in err.message


def test_utf8_byte_order_mark_is_accepted() -> None:
    assert to_plain(parse_bytes("\ufeffa: é\n".encode("utf-8"), "f.yaml")) == {"a": "é"}


def test_control_characters_are_refused_at_their_line() -> None:
    err = error_of(b"a: 1\nb: \x07\n")
    assert err.line == 2 and "U+0007" in err.message


def test_multiple_documents_are_refused() -> None:
    assert "single document" in error_of(b"a: 1\n---\nb: 2\n").message


def test_exponent_without_dot_is_a_number_but_quoted_stays_text() -> None:
    assert to_plain(parse_text("a: 1e-3\nb: '1e-3'\nc: 2E+4\n", "f")) == {"a": 0.001, "b": "1e-3", "c": 20000.0}


def test_oversized_integer_is_refused_not_crashed() -> None:
    assert "ordinary number" in error_of(b"a: " + b"9" * 5000 + b"\n").message


def test_read_file_refuses_a_directory(tmp_path) -> None:
    with pytest.raises(InputError) as info:
        read_file(tmp_path)
    assert "is a directory" in info.value.message


def test_merge_merges_mappings_replaces_lists_and_keeps_each_values_file() -> None:
    base = parse_text("a: {x: 1, y: 2}\nl: [1, 2]\n", "base.yaml")
    over = parse_text("a:\n  y: 3\nl: [9]\n", "over.yaml")
    merged = merge(base, over)
    assert to_plain(merged) == {"a": {"x": 1, "y": 3}, "l": [9]}
    a = merged.get("a")
    assert a.get("x").file == "base.yaml"
    assert (a.get("y").file, a.get("y").line) == ("over.yaml", 2)


# C0/C1 control characters (NEL is a YAML line break) are not text people write in these files.
_texts = st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=0x2FF, blacklist_categories=("Cc",)), max_size=12)
_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(allow_nan=False, allow_infinity=False),
    _texts,
    st.sampled_from(["1e5", "on", "no", "0x1f", "1_000", "12:30", "2001-12-14", "~", "-.inf", ".nan", "l+", "0.1-0.2j"]),
)
_plain = st.recursive(
    _scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(_texts, inner, max_size=4)),
    max_leaves=20,
)


@settings(max_examples=100, deadline=None)
@given(st.dictionaries(_texts, _plain, max_size=5))
def test_dump_then_parse_gives_back_the_same_data(data: dict) -> None:
    # Law: to_plain(parse(dump(x))) == x for plain data with text keys and finite numbers.
    assert to_plain(parse_text(dump_plain(data), "f.yaml")) == data
