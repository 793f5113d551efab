"""The rule language of ``[eligible] where``: safety, errors, semantics and precedence."""

from __future__ import annotations

import operator

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geoexp.errors import InputError, RuleError
from geoexp.units import UnitSet, parse_rule
from geoexp.units._rules import And, Compare, Member, Missing, Not, Or


def _frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "incidents": [0, 3, 5, np.nan, 2],
            "land_use": ["retail", "home", None, "retail", "park"],
            "land use": ["a", "b", "c", "d", "e"],
            "rue_été": [1.0, 2.0, 3.0, 4.0, 5.0],
            "flag": [True, False, True, False, True],
        },
        index=pd.Index([10, 11, 12, 13, 14], name="seg_id"),
    )


def _exploits(marker) -> list[str]:
    path = str(marker)
    return [
        f"@pd.io.common.os.system('touch {path}') == 0",
        f"__import__('os').system('touch {path}') == 0",
        f"`__import__('os').system('touch {path}')` == 0",
        "incidents.__class__.__bases__ == 0",
        "incidents.__class__ == 0",
        f"(lambda: __import__('os').system('touch {path}'))() == 0",
        f"open('{path}', 'w') == 0",
        "@incidents > 1",
        "incidents.sum() > 1",
        f'exec(\'open("{path}", "w")\')',
        f"land_use == 'x' or __import__('os').system('touch {path}')",
        "[x for x in ().__class__.__base__.__subclasses__()]",
        f'incidents > 1 and `x`; import os; os.system("touch {path}")',
    ]


@pytest.mark.parametrize("index", range(13))
def test_exploits_raise_our_error_and_run_nothing(tmp_path, index):
    marker = tmp_path / "pwned"
    rule = _exploits(marker)[index]
    with pytest.raises(RuleError):
        parse_rule(rule).mask(_frame(), "units.gpkg")
    assert not marker.exists()


def test_exploit_through_unitset_select(tmp_path):
    from geoexp.sampleregion import synthetic_grid

    marker = tmp_path / "pwned"
    units = UnitSet.from_frame(synthetic_grid(4), "unit_id")
    with pytest.raises(InputError, match="'@'"):
        units.select(f"@pd.io.common.os.system('touch {marker}') == 0")
    assert not marker.exists()


def test_rule_error_is_an_input_error():
    assert issubclass(RuleError, InputError)
    assert issubclass(RuleError, ValueError)


def test_grammar_features():
    f = _frame()

    def m(rule):
        return parse_rule(rule).mask(f).tolist()

    # Worked by hand from the five rows of _frame().
    assert m("incidents >= 3") == [False, True, True, False, False]
    assert m("incidents != 3") == [True, False, True, False, True]  # missing compares false
    assert m("not incidents == 3") == [True, False, True, True, True]  # not flips afterwards
    assert m("land_use in ['retail', \"park\"]") == [True, False, False, True, True]
    assert m("land_use not in ['retail']") == [False, True, False, False, True]
    assert m("land_use is missing") == [False, False, True, False, False]
    assert m("incidents is not missing") == [True, True, True, False, True]
    assert m("`land use` == 'c' or `land use` > 'd'") == [False, False, True, False, True]
    assert m("rue_été < 2.5") == [True, True, False, False, False]  # non-ASCII names
    assert m("seg_id >= 13") == [False, False, False, True, True]  # the id is a column
    assert m("flag") == [True, False, True, False, True]
    assert m("flag == false") == [False, True, False, True, False]
    assert m("incidents > -1 and incidents < 1e1") == [True, True, True, False, True]
    assert m("incidents in []") == [False] * 5
    assert m("3 < incidents") == [False, False, True, False, False]
    assert m("land_use < 'j'") == [False, True, False, False, False]  # text orders a-z


def test_numbers_stored_as_text_are_numbers():
    f = pd.DataFrame({"n": pd.Series(["1", "2"], dtype=object).map(int)})
    assert parse_rule("n > 1").mask(f).tolist() == [False, True]


@pytest.mark.parametrize(
    ("rule", "words", "column"),
    [
        ("crimes > 3", "no column 'crimes'", 1),
        ("incidents > 3 and `land usage` == 'a'", "no column 'land usage'", 19),
        ("land_use > 5", "holds text and cannot be compared with the number 5", 10),
        ("incidents == '5'", "write the number without quotes", 11),
        ("flag < true", "compared with == or != only", 6),
        ("incidents", "must give true/false", 1),
        ("incidents + 1", "must give true/false", 11),
        ("incidents = 1", "write '=='", 11),
        ("incidents > 1 & flag", "write 'and'", 15),
        ("(incidents > 1", "expected ')'", 15),
        ("incidents in (1, 2)", "expected '['", 14),
        ("incidents in [1, 2", "expected ',' or ']'", 19),
        ("land_use == 'retail", "not closed", 13),
        ("`land use == 'a'", "not closed", 1),
        ("incidents is 3", "expected 'missing'", 14),
        ("incidents not 3", "expected 'in'", 15),
        ("12abc > 1", "runs into", 1),
        ("", "empty", 1),
        ("incidents > 1 incidents", "expected 'and', 'or'", 15),
        ("geometry is missing", "geometry cannot be used", 1),
        ("land_use in ['a', 1]", "cannot be compared with the number 1", 19),
    ],
)
def test_errors_point_at_the_token(rule, words, column):
    f = _frame()
    with pytest.raises(RuleError) as info:
        parse_rule(rule).mask(f, "segments.gpkg")
    message = str(info.value)
    assert words in message
    assert f"(at position {column})" in message
    caret_line = message.splitlines()[-1]
    assert caret_line.index("^") - 2 == column - 1


def test_unknown_column_lists_the_columns():
    with pytest.raises(RuleError) as info:
        parse_rule("crimes > 3").mask(_frame(), "segments.gpkg")
    message = str(info.value)
    for column in ("'incidents'", "'land_use'", "'land use'", "'rue_été'", "'flag'"):
        assert column in message
    assert "segments.gpkg" in message and "'seg_id'" in message


def test_rule_columns_and_tree():
    rule = parse_rule("a > 1 and not (b in [1] or c is missing)")
    assert rule.columns == ("a", "b", "c")
    assert isinstance(rule.tree, And)
    assert isinstance(rule.tree.items[1], Not)
    assert isinstance(rule.tree.items[1].expr, Or)
    with pytest.raises(RuleError, match="must be text"):
        parse_rule(5)  # type: ignore[arg-type]


def test_precedence_not_and_or():
    # not binds tighter than and, and tighter than or (as in Python's grammar, the
    # Python language reference's operator precedence table).
    tree = parse_rule("a == 1 or b == 1 and not c == 1").tree
    assert isinstance(tree, Or)
    assert isinstance(tree.items[1], And)
    assert isinstance(tree.items[1].items[1], Not)
    assert isinstance(tree.items[1].items[1].expr, Compare)
    tree = parse_rule("not a == 1 and b in [1] or c is missing").tree
    assert isinstance(tree, Or) and isinstance(tree.items[0], And)
    assert isinstance(tree.items[0].items[0], Not)
    assert isinstance(tree.items[0].items[1], Member)
    assert isinstance(tree.items[1], Missing)


# ------------------------------------------------------------ property tests
_OPS = {
    "==": operator.eq,
    "!=": operator.ne,
    "<": operator.lt,
    "<=": operator.le,
    ">": operator.gt,
    ">=": operator.ge,
}
_WORDS = ["a", "b", "c", "it's", 'say "x"']


@st.composite
def _frames(draw):
    n = draw(st.integers(1, 12))
    x = draw(st.lists(st.one_of(st.none(), st.integers(-3, 3)), min_size=n, max_size=n))
    y = draw(
        st.lists(
            st.one_of(st.none(), st.floats(-5, 5, allow_nan=False).map(lambda v: round(v, 1))),
            min_size=n,
            max_size=n,
        )
    )
    t = draw(st.lists(st.one_of(st.none(), st.sampled_from(_WORDS)), min_size=n, max_size=n))
    return pd.DataFrame(
        {
            "x": pd.array(x, dtype="Int64"),
            "y": np.array([np.nan if v is None else v for v in y], dtype=float),
            "t t": pd.Series(t, dtype=object),
        }
    )


def _quote(word: str) -> str:
    return "'" + word.replace("\\", "\\\\").replace("'", "\\'") + "'"


def _number(v) -> str:
    return repr(v)


@st.composite
def _leaves(draw):
    """(rule text, reference function of the frame computed with plain pandas)."""
    kind = draw(st.sampled_from(["cmp_num", "cmp_text", "cmp_cols", "in", "missing"]))
    if kind == "cmp_num":
        col = draw(st.sampled_from(["x", "y"]))
        op = draw(st.sampled_from(list(_OPS)))
        value = draw(st.one_of(st.integers(-4, 4), st.floats(-4, 4).map(lambda v: round(v, 2))))

        def ref(f, col=col, op=op, value=value):
            s = f[col].astype(float)
            return _OPS[op](s, value).fillna(False).astype(bool) & s.notna()

        return f"{col} {op} {_number(value)}", ref
    if kind == "cmp_text":
        op = draw(st.sampled_from(list(_OPS)))
        word = draw(st.sampled_from([*_WORDS, "bb"]))

        def ref(f, op=op, word=word):
            s = f["t t"]
            present = s.notna()
            out = pd.Series(False, index=f.index)
            out[present] = _OPS[op](s[present].astype(str), word)
            return out

        return f"`t t` {op} {_quote(word)}", ref
    if kind == "cmp_cols":
        op = draw(st.sampled_from(list(_OPS)))

        def ref(f, op=op):
            a, b = f["x"].astype(float), f["y"]
            return _OPS[op](a, b).fillna(False).astype(bool) & a.notna() & b.notna()

        return f"x {op} y", ref
    if kind == "in":
        col = draw(st.sampled_from(["x", "t t"]))
        negate = draw(st.booleans())
        if col == "x":
            values = draw(st.lists(st.integers(-3, 3), max_size=4))
            shown = ", ".join(map(str, values))
        else:
            values = draw(st.lists(st.sampled_from(_WORDS), max_size=4))
            shown = ", ".join(map(_quote, values))

        def ref(f, col=col, negate=negate, values=values):
            s = f[col]
            hit = s.isin(values).fillna(False).astype(bool)
            return (~hit if negate else hit) & s.notna()

        name = "x" if col == "x" else "`t t`"
        return f"{name} {'not in' if negate else 'in'} [{shown}]", ref
    col = draw(st.sampled_from(["x", "y", "t t"]))
    negate = draw(st.booleans())

    def ref(f, col=col, negate=negate):
        return f[col].notna() if negate else f[col].isna()

    name = "`t t`" if col == "t t" else col
    return f"{name} is {'not ' if negate else ''}missing", ref


def _trees():
    def extend(children):
        def combine(parts):
            (a, fa), (b, fb), how = parts
            if how == "and":
                return f"({a}) and ({b})", lambda f: fa(f) & fb(f)
            if how == "or":
                return f"({a}) or ({b})", lambda f: fa(f) | fb(f)
            return f"not ({a})", lambda f: ~fa(f)

        return st.tuples(children, children, st.sampled_from(["and", "or", "not"])).map(combine)

    return st.recursive(_leaves(), extend, max_leaves=8)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(frame=_frames(), tree=_trees())
def test_rule_engine_matches_pandas_reference(frame, tree):
    # Reference: the same rule computed with plain pandas boolean operations, where
    # a missing value makes its comparison false (the documented rule).
    text, reference = tree
    expected = reference(frame).to_numpy(dtype=bool)
    got = parse_rule(text).mask(frame)
    np.testing.assert_array_equal(got, expected, err_msg=text)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(
    data=st.data(),
    n_terms=st.integers(1, 6),
)
def test_precedence_matches_python(data, n_terms):
    # Reference: Python's own boolean operators, whose precedence (not > and > or)
    # is stated in the Python language reference; truth values only, no columns.
    values = data.draw(st.lists(st.booleans(), min_size=n_terms, max_size=n_terms))
    nots = data.draw(st.lists(st.booleans(), min_size=n_terms, max_size=n_terms))
    joins = data.draw(
        st.lists(st.sampled_from(["and", "or"]), min_size=n_terms - 1, max_size=n_terms - 1)
    )
    ours, python = [], []
    for i, (v, neg) in enumerate(zip(values, nots, strict=True)):
        if i:
            ours.append(joins[i - 1])
            python.append(joins[i - 1])
        ours.append(("not " if neg else "") + ("true" if v else "false"))
        python.append(("not " if neg else "") + str(v))
    expected = bool(eval(" ".join(python)))  # noqa: S307 - our own True/False/and/or/not text
    frame = pd.DataFrame({"z": [0]})
    assert parse_rule(" ".join(ours)).mask(frame).tolist() == [expected]
