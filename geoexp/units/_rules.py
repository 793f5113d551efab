"""The rule language of ``[eligible] where``: a small grammar evaluated on unit attributes.

A rule is parsed by a tokenizer and a recursive-descent parser into a tree of
frozen nodes, then evaluated column by column with numpy and pandas. Nothing
in a rule can run code: there is no ``eval``, no attribute access, no call,
no ``@`` variable; a name is only ever looked up among the layer's columns.

Grammar
-------
::

    rule       := or_expr
    or_expr    := and_expr ("or" and_expr)*
    and_expr   := not_expr ("and" not_expr)*
    not_expr   := "not" not_expr | test
    test       := "(" rule ")"
                | operand "==" | "!=" | "<" | "<=" | ">" | ">=" operand
                | operand ["not"] "in" "[" [literal ("," literal)* [","]] "]"
                | operand "is" ["not"] "missing"
                | operand                    (a true/false column on its own)
    operand    := column | literal
    column     := name | `any text but a backquote`
    literal    := number | "-" number | 'text' | "text" | true | false

Names are identifiers (letters, digits and ``_``, not starting with a digit,
any script); a column whose name has spaces, punctuation or is a keyword is
written between backquotes. The unit id (the index) is a column too. Strings
take single or double quotes; a backslash escapes the next character. Numbers
are decimal (``12``, ``-3.5``, ``1e3``). Keywords are ``and or not in is
missing true false`` (``True``/``False`` also read as true/false).
Precedence, from tightest: comparisons, ``not``, ``and``, ``or``.

Missing values
--------------
A comparison or an ``in`` test involving a missing value is **false**, for
``!=`` and ``not in`` too; only ``is missing`` is true there. ``not`` flips a
result afterwards, so ``not (x == 1)`` is true where ``x`` is missing while
``x != 1`` is false.

Types
-----
A column holds numbers, text or true/false values (a text column whose values
are all numbers, as some files store them, is read as numbers). Numbers compare
with numbers and text with text (text orders alphabetically); true/false
values only compare for equality with ``true``/``false`` or another true/false
column. Anything else, such as a text column compared with a number, is
refused with an error rather than silently false.
"""

from __future__ import annotations

import operator
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from geoexp.errors import RuleError, describe_rows

__all__ = ["Rule", "parse_rule"]

_KEYWORDS = {"and", "or", "not", "in", "is", "missing", "true", "false", "True", "False"}
_COMPARISONS: dict[str, Callable] = {
    "==": operator.eq,
    "!=": operator.ne,
    "<": operator.lt,
    "<=": operator.le,
    ">": operator.gt,
    ">=": operator.ge,
}
_HINTS = {
    "&": "write 'and' instead of '&'",
    "|": "write 'or' instead of '|'",
    "~": "write 'not' instead of '~'",
    "!": "write 'not' (or '!=' for 'differs from')",
    "=": "write '==' to compare",
    "@": "'@' variables are not part of the rule language; write the value itself",
    ".": "attribute access is not part of the rule language",
}
_ARITHMETIC = (
    "a rule must give true/false for each unit; arithmetic is not part of the rule language"
)
_HINTS.update(dict.fromkeys("+-*/%", _ARITHMETIC))

Kind = Literal["number", "text", "bool", "empty"]


# ---------------------------------------------------------------- tokens
@dataclass(frozen=True)
class _Token:
    kind: str  # name, column, number, string, op, keyword, punct, end
    text: str
    value: object
    pos: int


_NUMBER = re.compile(r"(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_NAME = re.compile(r"[^\W\d]\w*")


def _caret(text: str, pos: int, length: int = 1) -> str:
    """The rule on one line and a caret line under the offending token."""
    shown = text.replace("\n", " ").replace("\t", " ")
    return f"\n  {shown}\n  {' ' * pos}{'^' * max(1, length)}"


def _error(text: str, pos: int, length: int, message: str) -> RuleError:
    return RuleError(
        f"the rule {text!r} could not be read: {message} (at position {pos + 1})"
        + _caret(text, pos, length)
    )


def _tokenize(text: str) -> list[_Token]:
    tokens: list[_Token] = []
    i = 0
    n = len(text)
    while i < n:
        ch = text[i]
        if ch.isspace():
            i += 1
            continue
        if ch == "`":
            end = text.find("`", i + 1)
            if end < 0:
                raise _error(text, i, 1, "a backquoted column name is not closed")
            name = text[i + 1 : end]
            if not name:
                raise _error(text, i, 2, "an empty backquoted column name")
            tokens.append(_Token("column", text[i : end + 1], name, i))
            i = end + 1
            continue
        if ch in "'\"":
            j = i + 1
            chars: list[str] = []
            while j < n and text[j] != ch:
                if text[j] == "\\" and j + 1 < n:
                    j += 1
                chars.append(text[j])
                j += 1
            if j >= n:
                raise _error(text, i, n - i, "a quoted text is not closed")
            tokens.append(_Token("string", text[i : j + 1], "".join(chars), i))
            i = j + 1
            continue
        if ch.isdigit() or (ch == "." and i + 1 < n and text[i + 1].isdigit()):
            match = _NUMBER.match(text, i)
            # a digit, or a point before a digit, always starts a number
            assert match is not None
            end = match.end()
            if end < n and (text[end].isalnum() or text[end] in "_."):
                tail = _NAME.match(text, end)
                length = end - i + (tail.end() - end if tail else 1)
                raise _error(text, i, length, "a number runs into other characters")
            word = match.group()
            value: float | int = (
                int(word) if word.isdigit() else float(word)  # 12 stays an integer
            )
            tokens.append(_Token("number", word, value, i))
            i = end
            continue
        match = _NAME.match(text, i)
        if match:
            word = match.group()
            kind = "keyword" if word in _KEYWORDS else "name"
            tokens.append(_Token(kind, word, word, i))
            i = match.end()
            continue
        two = text[i : i + 2]
        if two in ("==", "!=", "<=", ">="):
            tokens.append(_Token("op", two, two, i))
            i += 2
            continue
        if ch in "<>":
            tokens.append(_Token("op", ch, ch, i))
            i += 1
            continue
        if ch in "()[],":
            tokens.append(_Token("punct", ch, ch, i))
            i += 1
            continue
        if ch == "-":
            tokens.append(_Token("minus", ch, ch, i))
            i += 1
            continue
        hint = _HINTS.get(ch, "it is not part of the rule language")
        raise _error(text, i, 1, f"unexpected character {ch!r}; {hint}")
    tokens.append(_Token("end", "", None, n))
    return tokens


# ---------------------------------------------------------------- tree
@dataclass(frozen=True)
class Column:
    """A column of the units (or the unit id), by name."""

    name: str
    pos: int
    length: int


@dataclass(frozen=True)
class Constant:
    """A number, a text or true/false."""

    value: object
    kind: Kind
    pos: int
    length: int


@dataclass(frozen=True)
class Compare:
    """``left op right`` with one of ``== != < <= > >=``."""

    op: str
    left: Column | Constant
    right: Column | Constant
    pos: int


@dataclass(frozen=True)
class Member:
    """``operand in [...]`` (or ``not in`` when ``negate``)."""

    operand: Column | Constant
    values: tuple[Constant, ...]
    negate: bool
    pos: int


@dataclass(frozen=True)
class Missing:
    """``operand is missing`` (or ``is not missing`` when ``negate``)."""

    operand: Column | Constant
    negate: bool


@dataclass(frozen=True)
class Truth:
    """A true/false column used on its own."""

    operand: Column | Constant


@dataclass(frozen=True)
class Not:
    """``not expr``."""

    expr: Node


@dataclass(frozen=True)
class And:
    """``a and b and ...``."""

    items: tuple[Node, ...]


@dataclass(frozen=True)
class Or:
    """``a or b or ...``."""

    items: tuple[Node, ...]


Node = Compare | Member | Missing | Truth | Not | And | Or


class _Parser:
    def __init__(self, text: str) -> None:
        self.text = text
        self.tokens = _tokenize(text)
        self.i = 0

    @property
    def tok(self) -> _Token:
        return self.tokens[self.i]

    def fail(self, message: str, tok: _Token | None = None) -> RuleError:
        tok = tok or self.tok
        return _error(self.text, tok.pos, len(tok.text) or 1, message)

    def take(self) -> _Token:
        tok = self.tok
        self.i += 1
        return tok

    def at(self, kind: str, text: str | None = None) -> bool:
        return self.tok.kind == kind and (text is None or self.tok.text == text)

    def parse(self) -> Node:
        if self.at("end"):
            raise self.fail("the rule is empty")
        node = self.or_expr()
        if not self.at("end"):
            raise self.fail(
                f"unexpected {self.describe(self.tok)}; expected 'and', 'or' or the end"
            )
        return node

    @staticmethod
    def describe(tok: _Token) -> str:
        return "end of the rule" if tok.kind == "end" else repr(tok.text)

    def or_expr(self) -> Node:
        items = [self.and_expr()]
        while self.at("keyword", "or"):
            self.take()
            items.append(self.and_expr())
        return items[0] if len(items) == 1 else Or(tuple(items))

    def and_expr(self) -> Node:
        items = [self.not_expr()]
        while self.at("keyword", "and"):
            self.take()
            items.append(self.not_expr())
        return items[0] if len(items) == 1 else And(tuple(items))

    def not_expr(self) -> Node:
        if self.at("keyword", "not"):
            self.take()
            return Not(self.not_expr())
        return self.test()

    def test(self) -> Node:
        if self.at("punct", "("):
            self.take()
            node = self.or_expr()
            if not self.at("punct", ")"):
                raise self.fail(f"expected ')' but found {self.describe(self.tok)}")
            self.take()
            return node
        left = self.operand()
        tok = self.tok
        if tok.kind == "op":
            self.take()
            right = self.operand()
            return Compare(tok.text, left, right, tok.pos)
        if tok.kind == "keyword" and tok.text == "in":
            self.take()
            return Member(left, self.literal_list(), False, tok.pos)
        if tok.kind == "keyword" and tok.text == "not":
            self.take()
            if not self.at("keyword", "in"):
                raise self.fail("expected 'in' after 'not' here (as in: x not in [1, 2])")
            self.take()
            return Member(left, self.literal_list(), True, tok.pos)
        if tok.kind == "keyword" and tok.text == "is":
            self.take()
            negate = False
            if self.at("keyword", "not"):
                self.take()
                negate = True
            if not self.at("keyword", "missing"):
                raise self.fail("expected 'missing' after 'is' (as in: x is missing)")
            self.take()
            return Missing(left, negate)
        if tok.kind == "punct" and tok.text == "(":
            raise self.fail("calls are not part of the rule language")
        if tok.kind == "minus":
            raise self.fail(_ARITHMETIC)
        return Truth(left)

    def operand(self) -> Column | Constant:
        tok = self.tok
        if tok.kind == "name":
            self.take()
            assert isinstance(tok.value, str)
            return Column(tok.value, tok.pos, len(tok.text))
        if tok.kind == "column":
            self.take()
            assert isinstance(tok.value, str)
            return Column(tok.value, tok.pos, len(tok.text))
        return self.literal()

    def literal(self) -> Constant:
        tok = self.tok
        if tok.kind == "number":
            self.take()
            return Constant(tok.value, "number", tok.pos, len(tok.text))
        if tok.kind == "minus":
            self.take()
            num = self.tok
            if num.kind != "number":
                raise self.fail("expected a number after '-'")
            self.take()
            assert isinstance(num.value, int | float)
            return Constant(-num.value, "number", tok.pos, num.pos + len(num.text) - tok.pos)
        if tok.kind == "string":
            self.take()
            return Constant(tok.value, "text", tok.pos, len(tok.text))
        if tok.kind == "keyword" and tok.text in ("true", "false", "True", "False"):
            self.take()
            return Constant(tok.text.lower() == "true", "bool", tok.pos, len(tok.text))
        raise self.fail(
            f"expected a column, a number, a quoted text or true/false but found "
            f"{self.describe(tok)}"
        )

    def literal_list(self) -> tuple[Constant, ...]:
        if not self.at("punct", "["):
            raise self.fail("expected '[' to start the list of values (as in: x in [1, 2])")
        self.take()
        values: list[Constant] = []
        while not self.at("punct", "]"):
            values.append(self.literal())
            if self.at("punct", ","):
                self.take()
            elif not self.at("punct", "]"):
                raise self.fail(f"expected ',' or ']' but found {self.describe(self.tok)}")
        self.take()
        return tuple(values)


# ---------------------------------------------------------------- evaluation
@dataclass(frozen=True)
class _Values:
    kind: Kind
    values: np.ndarray  # float64 for numbers, object for text, bool for bool
    missing: np.ndarray  # bool
    label: str


def _column_kind(series: pd.Series) -> tuple[Kind | None, np.ndarray, np.ndarray]:
    """Kind, values and missing mask of a column; kind None for anything unusable."""
    missing = series.isna().to_numpy(dtype=bool)
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return "bool", series.to_numpy(dtype=bool, na_value=False), missing
    if pd.api.types.is_numeric_dtype(dtype):
        return "number", series.to_numpy(dtype=np.float64, na_value=np.nan), missing
    if not (pd.api.types.is_object_dtype(dtype) or pd.api.types.is_string_dtype(dtype)):
        return None, np.empty(0), missing
    present = series[~missing]
    if present.empty:
        return "empty", np.zeros(len(series)), missing
    kinds = {type(v) for v in present}
    if all(issubclass(k, str) for k in kinds):
        return "text", series.astype(object).to_numpy(), missing
    if all(issubclass(k, (bool, np.bool_)) for k in kinds):
        return "bool", series.fillna(False).astype(bool).to_numpy(), missing
    if all(issubclass(k, (int, float, np.integer, np.floating)) for k in kinds):
        return "number", pd.to_numeric(series).to_numpy(dtype=np.float64, na_value=np.nan), missing
    return None, np.empty(0), missing


_KIND_WORDS = {
    "number": "numbers",
    "text": "text",
    "bool": "true/false values",
    "empty": "only missing values",
}


@dataclass(frozen=True)
class _Context:
    text: str
    frame: pd.DataFrame
    source: str

    @property
    def n(self) -> int:
        return len(self.frame)

    def columns(self) -> list[str]:
        return [str(c) for c in self.frame.columns if c != self.geometry_name()]

    def geometry_name(self) -> object:
        return getattr(getattr(self.frame, "geometry", None), "name", "geometry")

    def fail(self, pos: int, length: int, message: str) -> RuleError:
        where = f" on the units of '{self.source}'" if self.source else ""
        return RuleError(
            f"the rule {self.text!r} could not be evaluated{where}: {message} "
            f"(at position {pos + 1})" + _caret(self.text, pos, length)
        )

    def values(self, node: Column | Constant) -> _Values:
        if isinstance(node, Constant):
            if node.kind == "number":
                assert isinstance(node.value, int | float)
                values = np.full(self.n, float(node.value))
            elif node.kind == "bool":
                values = np.full(self.n, bool(node.value))
            else:
                values = np.full(self.n, node.value, dtype=object)
            return _Values(node.kind, values, np.zeros(self.n, dtype=bool), self._word(node))
        frame = self.frame
        name = node.name
        if name in frame.columns and name != self.geometry_name():
            series = frame[name]
            if isinstance(series, pd.DataFrame):
                raise self.fail(node.pos, node.length, f"there are several columns named {name!r}")
        elif frame.index.name is not None and name == str(frame.index.name):
            series = frame.index.to_series(index=frame.index)
        else:
            if name == self.geometry_name():
                problem = "the geometry cannot be used in a rule"
            else:
                problem = f"the units have no column {name!r}"
            cols = self.columns()
            raise self.fail(
                node.pos,
                node.length,
                f"{problem}; columns: {describe_rows(cols, limit=len(cols)) or 'none'}; "
                f"the id is {frame.index.name!r}",
            )
        kind, values, missing = _column_kind(series)
        if kind is None:
            raise self.fail(
                node.pos,
                node.length,
                f"column {name!r} holds {series.dtype} values of mixed or unsupported types; "
                "rules compare numbers, text or true/false values",
            )
        return _Values(kind, values, missing, f"column {name!r}")

    @staticmethod
    def _word(node: Constant) -> str:
        if node.kind == "number":
            return f"the number {node.value!r}"
        if node.kind == "text":
            return f"the text {node.value!r}"
        return f"the value {str(node.value).lower()}"

    def check_kinds(self, op: str, a: _Values, b: _Values, pos: int, length: int) -> None:
        if "empty" in (a.kind, b.kind):
            return
        if a.kind != b.kind:
            hint = ""
            if (a.kind, b.kind) == ("text", "number"):
                hint = "; put the number in quotes to compare as text"
            elif (a.kind, b.kind) == ("number", "text"):
                hint = "; write the number without quotes"
            other = b.label if b.label.startswith("the ") else f"{b.label} ({_KIND_WORDS[b.kind]})"
            raise self.fail(
                pos,
                length,
                f"{a.label} holds {_KIND_WORDS[a.kind]} and cannot be compared with {other}{hint}",
            )
        if a.kind == "bool" and op not in ("==", "!=", "in", "not in"):
            raise self.fail(
                pos, length, f"true/false values are compared with == or != only, not {op}"
            )

    def evaluate(self, node: Node) -> np.ndarray:
        if isinstance(node, Or):
            out = self.evaluate(node.items[0])
            for item in node.items[1:]:
                out = out | self.evaluate(item)
            return out
        if isinstance(node, And):
            out = self.evaluate(node.items[0])
            for item in node.items[1:]:
                out = out & self.evaluate(item)
            return out
        if isinstance(node, Not):
            return ~self.evaluate(node.expr)
        if isinstance(node, Missing):
            missing = self.values(node.operand).missing
            return ~missing if node.negate else missing.copy()
        if isinstance(node, Truth):
            v = self.values(node.operand)
            if v.kind not in ("bool", "empty"):
                op = node.operand
                raise RuleError(
                    f"the rule {self.text!r} must give true/false for each unit: {v.label} holds "
                    f"{_KIND_WORDS[v.kind]}; compare it (==, !=, <, <=, >, >=, in) with a value "
                    f"(at position {op.pos + 1})" + _caret(self.text, op.pos, op.length)
                )
            if v.kind == "empty":
                return np.zeros(self.n, dtype=bool)
            return v.values & ~v.missing
        if isinstance(node, Compare):
            a, b = self.values(node.left), self.values(node.right)
            self.check_kinds(node.op, a, b, node.pos, len(node.op))
            keep = ~(a.missing | b.missing)
            out = np.zeros(self.n, dtype=bool)
            if "empty" in (a.kind, b.kind) or not keep.any():
                return out
            result = _COMPARISONS[node.op](a.values[keep], b.values[keep])
            out[keep] = np.asarray(result, dtype=bool)
            return out
        if isinstance(node, Member):
            a = self.values(node.operand)
            word = "not in" if node.negate else "in"
            for const in node.values:
                self.check_kinds(word, a, self.values(const), const.pos, const.length)
            out = np.zeros(self.n, dtype=bool)
            if a.kind == "empty":
                return out
            keep = ~a.missing
            wanted = [c.value for c in node.values]
            if a.kind == "number":
                hit = np.isin(a.values[keep], np.asarray(wanted, dtype=np.float64))
            else:
                hit = pd.Index(a.values[keep]).isin(wanted)
            out[keep] = ~hit if node.negate else hit
            return out
        raise TypeError(f"unknown rule node {node!r}")  # pragma: no cover - parser makes nodes


# ---------------------------------------------------------------- public face
@dataclass(frozen=True)
class Rule:
    """A parsed ``[eligible] where`` rule; see the module docstring for the grammar.

    Build one with :func:`parse_rule` (or :meth:`Rule.parse`); evaluate it with
    :meth:`mask`. Missing values compare false.

    Attributes
    ----------
    text : str
        The rule as written.
    tree : Node
        The expression tree (frozen nodes: ``Or``, ``And``, ``Not``, ``Compare``,
        ``Member``, ``Missing``, ``Truth`` over ``Column`` and ``Constant``).
    """

    text: str
    tree: Node

    @classmethod
    def parse(cls, text: str) -> Rule:
        """Parse ``text``; raise :class:`~geoexp.errors.RuleError` pointing at the bad token."""
        if not isinstance(text, str):
            raise RuleError(f"a rule must be text, got {type(text).__name__} {text!r}")
        return cls(text, _Parser(text).parse())

    @property
    def columns(self) -> tuple[str, ...]:
        """Names of the columns the rule reads, in order of first use."""
        seen: dict[str, None] = {}

        def walk(node: object) -> None:
            if isinstance(node, Column):
                seen.setdefault(node.name)
            elif isinstance(node, (Or, And)):
                for item in node.items:
                    walk(item)
            elif isinstance(node, Not):
                walk(node.expr)
            elif isinstance(node, Compare):
                walk(node.left)
                walk(node.right)
            elif isinstance(node, (Member, Missing, Truth)):
                walk(node.operand)

        walk(self.tree)
        return tuple(seen)

    def mask(self, frame: pd.DataFrame, source: str = "") -> np.ndarray:
        """Boolean keep-mask over the rows of ``frame`` (columns and the named index).

        Parameters
        ----------
        frame : pandas.DataFrame
            The units' attributes; the index, if named, is usable as a column.
        source : str
            The file the units came from, named in error messages.

        Returns
        -------
        numpy.ndarray
            One bool per row; a missing value makes its comparison false.

        Raises
        ------
        geoexp.errors.RuleError
            An unknown column (the message lists the columns), or values of
            kinds that cannot be compared (text with a number, say).
        """
        return _Context(self.text, frame, source).evaluate(self.tree)


def parse_rule(text: str) -> Rule:
    """Parse an ``[eligible] where`` rule into a :class:`Rule`.

    Parameters
    ----------
    text : str
        The rule, e.g. ``"land_use in ['retail', 'mixed'] and incidents_y1 >= 3"``.

    Returns
    -------
    Rule

    Raises
    ------
    geoexp.errors.RuleError
        The text is not a rule of the grammar; the message shows where.
    """
    return Rule.parse(text)
