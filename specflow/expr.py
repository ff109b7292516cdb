"""The expression language of specflow specs: derived columns and sample filters.

A spec writes ``log_yield = "log(yield_t_ha)"`` or ``"farm_ha > 0.5 and region in ['north']"``.
These strings are data, never code: they are tokenised and parsed here by a small Pratt parser
into an immutable tree, type-checked, and evaluated column-wise with numpy. Nothing is handed to
Python's ``eval``/``exec``/``compile`` or ``ast``.

The language
------------
* literals: numbers (``3``, ``2.5``, ``1e-3``), text in single or double quotes, ``true``,
  ``false``, and ``missing`` (a missing value);
* columns: bare names ``[A-Za-z_][A-Za-z0-9_]*``, or any other name in backticks: ```yield (t/ha)```;
* ``+ - * /``, ``^`` (or ``**``) with a number-literal exponent, unary ``-``, parentheses;
* ``== != < <= > >=`` (``a < b < c`` is refused), ``x in [..]``, ``x not in [..]`` with literal lists;
* ``and``, ``or``, ``not``; the functions in :data:`FUNCTIONS`, nothing else.

Precedence, loosest first: ``or``, ``and``, ``not``, comparisons and ``in``, ``+ -``, ``* /``,
unary ``-``, ``^``. So ``-2^2`` is ``-4`` and ``not a and b`` is ``(not a) and b``.

Missing values and types
------------------------
Values are numbers, text or true/false; true/false count as 1/0 where a number is needed.
Numbers are finite or missing: any operation whose result is infinite or NaN (``1/0``,
``log(0)``, ``sqrt(-1)``, an overflow) gives *missing*, and missing propagates through arithmetic
and functions. A comparison or ``in`` test involving a missing value is *false*, so a filter drops
such rows unless it says ``is_missing(x)``. ``and``/``or``/``not`` follow three-valued logic for
true/false columns that have missing entries; a true/false result that is still missing at the end
counts as false. ``round`` rounds halves to even; ``clip(x, lo, hi)`` is missing where ``lo > hi``;
``standardize`` uses the mean and the sample standard deviation (ddof = 1) of the non-missing rows
it is given, and refuses a column without variation.
"""

from __future__ import annotations

import difflib
import re
from collections import namedtuple
from typing import Iterable, NamedTuple

import numpy as np
import pandas as pd

__all__ = ["ExprError", "Expr", "parse", "FUNCTIONS"]

MAX_LENGTH = 2000
MAX_DEPTH = 50
MAX_EXPONENT = 100
MAX_LIST_ITEMS = 1000
MAX_NUMBER = 1e100
MAX_ROUND_DIGITS = 15


def _one_line(text: str) -> str:
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


class ExprError(ValueError):
    """A refused or failing expression; its message is one line naming the expression."""

    def __init__(self, expression: str, problem: str, position: int | None = None,
                 token: str | None = None, hint: str | None = None):
        self.expression, self.problem, self.position = expression, problem, position
        self.token, self.hint = token, hint
        shown = _one_line(str(expression))
        if len(shown) > 80:
            shown = shown[:77] + "..."
        message = f'expression "{shown}": {_one_line(problem)}'
        if position is not None:
            message += f" at position {position}"
        if hint:
            message += f" ({_one_line(hint)})"
        super().__init__(message)

    def __reduce__(self):
        return (ExprError, (self.expression, self.problem, self.position, self.token, self.hint))


# --------------------------------------------------------------------------- tokens

class _Tok(NamedTuple):
    kind: str  # num, str, name, kw, col, op, eof
    text: str  # the source text of the token
    pos: int  # 0-based offset in the source
    value: object = None


_NUM_RE = re.compile(r"(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NAME_RE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_OPS = ("**", "==", "!=", "<=", ">=", "+", "-", "*", "/", "^", "<", ">", "(", ")", "[", "]", ",")
_KEYWORDS = frozenset({"and", "or", "not", "in", "true", "false", "missing"})
# Names are only ever looked up as columns, so refusing these is for clear messages, not safety;
# other Python keywords (``yield``, ``pass``, ...) stay usable as column names.
_FORBIDDEN_WORDS = frozenset({"lambda", "import", "from", "def", "class", "return", "global", "nonlocal",
                              "del", "is", "if", "else", "for", "while", "with", "assert", "raise", "try",
                              "except", "async", "await", "True", "False", "None"})
_WORD_HINTS = {"True": "write true", "False": "write false", "None": "write missing",
               "is": "use == to compare, or is_missing(x)", "if": "use if_else(condition, a, b)",
               "lambda": "expressions cannot define functions"}
_CHAR_PROBLEMS = {  # character -> (problem, hint)
    ".": ("attribute access ('.') is not allowed", None),
    ";": ("semicolons are not allowed", "write a single expression"),
    "=": ("'=' is not a comparison", "write '=='"), "&": ("'&' is not allowed", "write 'and'"),
    "|": ("'|' is not allowed", "write 'or'"), "!": ("'!' is not allowed", "write 'not'"),
    ":": ("':' is not allowed", "there are no lambdas, slices or dictionaries"),
}
_ESCAPES = {"\\": "\\", "'": "'", '"': '"', "n": "\n", "t": "\t"}


def _tokenize(src: str) -> list[_Tok]:
    toks: list[_Tok] = []
    i, n = 0, len(src)

    def fail(problem, pos, token, hint=None):
        raise ExprError(src, problem, pos + 1, token, hint)

    while i < n:
        c = src[i]
        if c in " \t\r\n":
            i += 1
        elif m := _NUM_RE.match(src, i):
            value = float(m.group())
            if not abs(value) <= MAX_NUMBER:
                fail(f"number {m.group()} is too large", i, m.group(), f"magnitude at most {MAX_NUMBER:g}")
            toks.append(_Tok("num", m.group(), i, value))
            i = m.end()
        elif m := _NAME_RE.match(src, i):
            word = m.group()
            if word.startswith("__"):
                fail(f"'{word}' is not allowed", i, word, "names starting with '__' are reserved")
            if word in _FORBIDDEN_WORDS:
                fail(f"'{word}' is not allowed", i, word,
                     _WORD_HINTS.get(word, "it is not part of the expression language"))
            toks.append(_Tok("kw" if word in _KEYWORDS else "name", word, i, word))
            i = m.end()
        elif c in "'\"":
            out, j = [], i + 1
            while True:
                if j >= n:
                    fail("unterminated string", i, c, f"it opens with {c} and never closes")
                if src[j] == "\\":
                    if j + 1 >= n or src[j + 1] not in _ESCAPES:
                        fail(f"unknown escape '{src[j:j + 2]}' in a string", j, src[j:j + 2],
                             "allowed: \\\\ \\' \\\" \\n \\t")
                    out.append(_ESCAPES[src[j + 1]])
                    j += 2
                elif src[j] == c:
                    break
                else:
                    out.append(src[j])
                    j += 1
            toks.append(_Tok("str", src[i:j + 1], i, "".join(out)))
            i = j + 1
        elif c == "`":
            j = src.find("`", i + 1)
            if j < 0:
                fail("unterminated column name", i, "`", "it opens with ` and never closes")
            name = src[i + 1:j]
            if not name.strip() or not name.isprintable():
                fail("column name in backticks must be printable and not blank", i, src[i:j + 1])
            toks.append(_Tok("col", src[i:j + 1], i, name))
            i = j + 1
        else:
            op = next((o for o in _OPS if src.startswith(o, i)), None)
            if op is None:
                problem, hint = _CHAR_PROBLEMS.get(c, (f"unexpected character '{c}'", None))
                fail(problem, i, c, hint)
            toks.append(_Tok("op", op, i))
            i += len(op)
    toks.append(_Tok("eof", "", n))
    return toks


# --------------------------------------------------------------------------- tree

# Tree nodes. ``pos`` is the 0-based offset of the token the node came from, for messages.
Num = namedtuple("Num", "value pos")
Str = namedtuple("Str", "value pos")
Bool = namedtuple("Bool", "value pos")
Missing = namedtuple("Missing", "pos")
Col = namedtuple("Col", "name pos")
Neg = namedtuple("Neg", "arg pos")
Not = namedtuple("Not", "arg pos")
Arith = namedtuple("Arith", "ops args poss")  # one precedence level, left to right: a0 op0 a1 op1 a2 ...
Logic = namedtuple("Logic", "op args pos")  # args joined by one 'and' or 'or'
Pow = namedtuple("Pow", "base exponent pos")  # the exponent is a number
Cmp = namedtuple("Cmp", "op left right pos")
In = namedtuple("In", "negate arg items kind pos")  # items: literal values, all of one kind
Call = namedtuple("Call", "name args pos")

# kinds of values; ANY is a column whose kind is known only when the data is
NUM, BOOL, STR, NULL, ANY = "number", "true/false", "text", "missing", "column"
_NUMERIC, _LOGICAL, _TEXTUAL = {NUM, BOOL, NULL, ANY}, {BOOL, NULL, ANY}, {STR, NULL, ANY}
_KIND_WORDS = {NUM: "numbers", BOOL: "true/false values", STR: "text", NULL: "only missing values"}

#: The whitelist: function name -> its parameter names.
FUNCTIONS: dict[str, tuple[str, ...]] = {
    **{f: ("x",) for f in ("log", "log1p", "exp", "sqrt", "abs", "square", "floor", "ceil", "asinh",
                           "standardize", "is_missing", "not_missing")},
    "clip": ("x", "lo", "hi"), "round": ("x", "digits"), "min": ("a", "b"), "max": ("a", "b"),
    "fill_missing": ("x", "value"), "between": ("x", "lo", "hi"),
    "if_else": ("condition", "if_true", "if_false"), "lower": ("s",), "upper": ("s",),
}
_UNARY_NUMPY = {"log": np.log, "log1p": np.log1p, "exp": np.exp, "sqrt": np.sqrt, "abs": np.abs,
                "square": np.square, "floor": np.floor, "ceil": np.ceil, "asinh": np.arcsinh}
_ARITH = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide}
_COMPARE = {"==": np.equal, "!=": np.not_equal, "<": np.less, "<=": np.less_equal,
            ">": np.greater, ">=": np.greater_equal}
_INFIX_BP = {"or": 1, "and": 2, "in": 4, "not": 4, "+": 5, "-": 5, "*": 6, "/": 6, "^": 8, "**": 8,
             **{op: 4 for op in _COMPARE}}


def _literal_number(node) -> float | None:
    if isinstance(node, Num):
        return node.value
    if isinstance(node, Neg) and isinstance(node.arg, Num):
        return -node.arg.value
    return None


# --------------------------------------------------------------------------- parser

class _Parser:
    def __init__(self, src: str):
        self.src, self.toks, self.i, self.depth = src, _tokenize(src), 0, 0

    def peek(self, ahead: int = 0) -> _Tok:
        return self.toks[min(self.i + ahead, len(self.toks) - 1)]

    def take(self) -> _Tok:
        tok = self.toks[self.i]
        self.i += 1
        return tok

    def fail(self, problem, tok: _Tok, hint=None):
        raise ExprError(self.src, problem, tok.pos + 1, tok.text or None, hint)

    def unexpected(self, tok: _Tok, hint=None):
        if tok.kind == "eof":
            self.fail("unexpected end of expression", tok, hint)
        if hint is None and (tok.kind in ("num", "str", "name", "col") or tok.text in ("true", "false", "missing")):
            hint = "is an operator missing before it?"
        self.fail(f"unexpected {tok.text!r}" if tok.kind != "str" else f"unexpected string {tok.text}",
                  tok, hint)

    def expect(self, text: str):
        tok = self.peek()
        if tok.text != text or tok.kind != "op":
            self.unexpected(tok, "indexing ('[') is not allowed" if tok.text == "[" else f"expected '{text}'")
        return self.take()

    def parse(self):
        if not self.src.strip():
            raise ExprError(self.src, "the expression is empty")
        tree = self.expr(0)
        tok = self.peek()
        if tok.kind != "eof":
            if tok.text == "[":
                self.fail("indexing ('[') is not allowed", tok)
            if tok.text == "(":
                self.fail("unexpected '('", tok, "only the listed functions can be called, by name")
            self.unexpected(tok)
        return tree

    def expr(self, rbp: int):
        self.depth += 1
        if self.depth > MAX_DEPTH:
            self.fail(f"the expression is nested more than {MAX_DEPTH} levels deep", self.peek())
        left = self.prefix()
        while True:
            tok = self.peek()
            bp = _INFIX_BP.get(tok.text, 0) if tok.kind in ("op", "kw") else 0
            if bp <= rbp:
                break
            left = self.infix(left, self.take(), bp)
        self.depth -= 1
        return left

    def prefix(self):
        tok = self.take()
        if tok.kind == "num":
            return Num(tok.value, tok.pos)
        if tok.kind == "str":
            return Str(tok.value, tok.pos)
        if tok.kind == "col":
            return Col(tok.value, tok.pos)
        if tok.kind == "name":
            return self.call(tok) if self.peek().text == "(" else Col(tok.value, tok.pos)
        if tok.kind == "kw" and tok.text in ("true", "false"):
            return Bool(tok.text == "true", tok.pos)
        if tok.kind == "kw" and tok.text == "missing":
            return Missing(tok.pos)
        if tok.kind == "kw" and tok.text == "not":
            return Not(self.expr(3), tok.pos)
        if tok.kind == "op" and tok.text == "(":
            inner = self.expr(0)
            self.expect(")")
            return inner
        if tok.kind == "op" and tok.text == "-":
            return Neg(self.expr(7), tok.pos)
        self.i -= 1
        self.unexpected(tok, "expected a number, string, column or '('")

    def call(self, tok: _Tok):
        name = tok.text
        if name not in FUNCTIONS:
            close = difflib.get_close_matches(name, sorted(FUNCTIONS), n=1, cutoff=0.6)
            hint = "allowed: " + ", ".join(sorted(FUNCTIONS)) + (f"; did you mean '{close[0]}'?" if close else "")
            self.fail(f"unknown function '{name}'", tok, hint)
        self.take()  # "("
        args = []
        if self.peek().text != ")":
            args.append(self.expr(0))
            while self.peek().text == ",":
                self.take()
                args.append(self.expr(0))
        self.expect(")")
        params = FUNCTIONS[name]
        if len(args) != len(params):
            self.fail(f"{name}() takes {len(params)} argument{'s' * (len(params) > 1)} "
                      f"({', '.join(params)}) but got {len(args)}", tok)
        if name == "round":
            digits = _literal_number(args[1])
            if digits is None or digits != int(digits) or abs(digits) > MAX_ROUND_DIGITS:
                self.fail("the digits of round() must be a whole number literal", tok,
                          f"between -{MAX_ROUND_DIGITS} and {MAX_ROUND_DIGITS}")
        if name in ("clip", "between"):
            lo, hi = _literal_number(args[1]), _literal_number(args[2])
            if lo is not None and hi is not None and lo > hi:
                self.fail(f"{name}() has lower bound {lo:g} above upper bound {hi:g}", tok)
        return Call(name, tuple(args), tok.pos)

    def infix(self, left, tok: _Tok, bp: int):
        op = tok.text
        if op in _ARITH:
            right = self.expr(bp)
            if isinstance(left, Arith) and _INFIX_BP[left.ops[0]] == bp:
                return Arith(left.ops + (op,), left.args + (right,), left.poss + (tok.pos,))
            return Arith((op,), (left, right), (tok.pos,))
        if op in ("^", "**"):
            exponent = _literal_number(self.expr(bp - 1))
            if exponent is None:
                self.fail(f"the exponent of '{op}' must be a number literal", tok,
                          "use sqrt(x) for square roots; chained powers need parentheses")
            if abs(exponent) > MAX_EXPONENT:
                self.fail(f"exponent {_fmt_num(exponent)} is too large", tok, f"at most {MAX_EXPONENT}")
            return Pow(left, exponent, tok.pos)
        if op in ("and", "or"):
            right = self.expr(bp)
            if isinstance(left, Logic) and left.op == op:
                return Logic(op, left.args + (right,), left.pos)
            return Logic(op, (left, right), tok.pos)
        if op in _COMPARE:
            node = Cmp(op, left, self.expr(bp), tok.pos)
            if isinstance(node.left, Missing) or isinstance(node.right, Missing):
                self.fail(f"comparing with missing using '{op}' is always false", tok,
                          "use is_missing(x) or not_missing(x)")
        else:  # in, not in
            if op == "not":
                if self.peek().text != "in":
                    self.unexpected(self.peek(), "did you mean 'not in'?")
                self.take()
            node = In(op == "not", left, *self.items(), tok.pos)
        nxt = self.peek()
        if nxt.kind in ("op", "kw") and _INFIX_BP.get(nxt.text) == 4 and (nxt.text != "not" or self.peek(1).text == "in"):
            self.fail(f"chained comparison '{nxt.text}' is not supported", nxt,
                      "use between(x, lo, hi), or join comparisons with 'and'")
        return node

    def items(self):
        start = self.peek()
        if start.text != "[":
            self.unexpected(start, "'in' needs a list of literals in square brackets, like [1, 2]")
        self.take()
        values, kinds = [], set()
        while True:
            tok, sign = self.take(), 1.0
            if tok.text == "-" and self.peek().kind == "num":
                tok, sign = self.take(), -1.0
            if tok.kind == "num":
                values.append(sign * tok.value)
                kinds.add(NUM)
            elif tok.kind == "str":
                values.append(tok.value)
                kinds.add(STR)
            elif tok.kind == "kw" and tok.text in ("true", "false"):
                values.append(tok.text == "true")
                kinds.add(BOOL)
            elif tok.text == "missing":
                self.fail("missing cannot be a list item", tok, "use is_missing(x)")
            elif tok.text == "]" and not values:
                self.fail("the list is empty", tok)
            else:
                self.i -= 1
                self.unexpected(tok, "list items must be literal numbers, strings or true/false")
            if len(values) > MAX_LIST_ITEMS:
                self.fail(f"the list has more than {MAX_LIST_ITEMS} items", tok)
            if len(kinds) > 1:
                self.fail("a list mixes " + " and ".join(sorted(kinds)), tok)
            sep = self.take()
            if sep.text == "]":
                return tuple(values), kinds.pop()
            if sep.text != ",":
                self.i -= 1
                self.unexpected(sep, "expected ',' or ']'")


# --------------------------------------------------------------------------- type rules

def _describe(node, kind: str) -> str:
    if isinstance(node, Col):
        return f"column '{node.name}' holds {_KIND_WORDS[kind]}"
    shown = _canon(node) if isinstance(node, (Num, Str, Bool, Missing)) else f"'{_canon(node)}'"
    return f"{shown} is {'text' if kind == STR else _KIND_WORDS[kind]}"


def _refuse(src: str, problem: str, pos: int):
    """Raise for the operator or function name that starts at offset ``pos``."""
    m = _NAME_RE.match(src, pos)
    token = m.group() if m else next((o for o in _OPS if src.startswith(o, pos)), src[pos:pos + 1])
    raise ExprError(src, problem, pos + 1, token)


def _need(src, pos, what, node, kind, allowed, wanted):
    if kind not in allowed:
        _refuse(src, f"{what} needs {wanted}, but {_describe(node, kind)}", pos)


def _unify(src, pos, what, kinds):
    a, b = kinds
    if a == b or b == NULL:
        return a
    if a == NULL:
        return b
    if ANY in (a, b):
        return ANY
    if {a, b} == {NUM, BOOL}:
        return NUM
    _refuse(src, f"{what} mixes {_KIND_WORDS[a]} and {_KIND_WORDS[b]}", pos)


def _family(kinds) -> str:
    concrete = set(kinds) - {NULL, ANY}
    return STR if STR in concrete else (BOOL if concrete == {BOOL} else NUM)


def _rule(src: str, node, kinds: list[str]) -> str:
    """The kind of ``node`` given its children's kinds; raises ExprError on a mismatch.

    Used both statically (columns are ANY) and during evaluation (columns are concrete)."""
    if isinstance(node, (Neg, Pow, Arith)):
        what = {Neg: "'-'", Pow: "'^'"}.get(type(node))
        children = node.args if isinstance(node, Arith) else [node.arg if isinstance(node, Neg) else node.base]
        for i, (child, kind) in enumerate(zip(children, kinds)):
            pos = node.poss[max(i - 1, 0)] if isinstance(node, Arith) else node.pos
            op = what or f"'{node.ops[max(i - 1, 0)]}'"
            _need(src, pos, op, child, kind, _NUMERIC, "numbers")
        return NUM
    if isinstance(node, (Not, Logic)):
        what = "'not'" if isinstance(node, Not) else f"'{node.op}'"
        for child, kind in zip([node.arg] if isinstance(node, Not) else node.args, kinds):
            _need(src, node.pos, what, child, kind, _LOGICAL, "true/false values")
        return BOOL
    if isinstance(node, Cmp):
        if node.op in ("==", "!="):
            known = set(kinds) - {NULL, ANY}
            if STR in known and len(known) > 1:
                _refuse(src, f"'{node.op}' compares text with {_KIND_WORDS[(known - {STR}).pop()]}", node.pos)
        else:
            for child, kind in zip((node.left, node.right), kinds):
                _need(src, node.pos, f"'{node.op}'", child, kind, _NUMERIC, "numbers")
        return BOOL
    if isinstance(node, In):
        allowed = _TEXTUAL if node.kind == STR else _NUMERIC
        _need(src, node.pos, "'in'" if not node.negate else "'not in'", node.arg, kinds[0], allowed,
              "text" if node.kind == STR else "numbers or true/false")
        return BOOL
    if isinstance(node, Call):
        name, args = node.name, node.args
        if name in ("is_missing", "not_missing"):
            return BOOL
        if name == "fill_missing":
            return _unify(src, node.pos, "fill_missing()", kinds)
        if name == "if_else":
            _need(src, node.pos, "the condition of if_else()", args[0], kinds[0], _LOGICAL, "true/false values")
            return _unify(src, node.pos, "if_else()", kinds[1:])
        allowed, wanted = (_TEXTUAL, "text") if name in ("lower", "upper") else (_NUMERIC, "a number")
        for param, child, kind in zip(FUNCTIONS[name], args, kinds):
            _need(src, node.pos, f"argument '{param}' of {name}()", child, kind, allowed, wanted)
        return STR if name in ("lower", "upper") else (BOOL if name == "between" else NUM)
    raise AssertionError(f"unhandled node {node!r}")  # pragma: no cover - the parser makes no others


def _children(node) -> tuple:
    if isinstance(node, (Neg, Not, In)):
        return (node.arg,)
    if isinstance(node, Pow):
        return (node.base,)
    if isinstance(node, Cmp):
        return (node.left, node.right)
    if isinstance(node, (Arith, Logic, Call)):
        return node.args
    return ()


_LEAF_KINDS = {Num: NUM, Str: STR, Bool: BOOL, Missing: NULL, Col: ANY}


def _check(src: str, node, depth: int, columns: dict) -> str:
    if depth > MAX_DEPTH:
        raise ExprError(src, f"the expression is nested more than {MAX_DEPTH} levels deep",
                        getattr(node, "pos", node.poss[0] if isinstance(node, Arith) else 0) + 1)
    if isinstance(node, Col):
        columns.setdefault(node.name, node.pos)
    if type(node) in _LEAF_KINDS:
        return _LEAF_KINDS[type(node)]
    return _rule(src, node, [_check(src, c, depth + 1, columns) for c in _children(node)])


# --------------------------------------------------------------------------- canonical text

_PREC = {Not: 3, Cmp: 4, In: 4, Neg: 7, Pow: 8}


def _prec(node) -> int:
    if isinstance(node, Logic):
        return 1 if node.op == "or" else 2
    if isinstance(node, Arith):
        return _INFIX_BP[node.ops[0]]
    return _PREC.get(type(node), 9)


def _fmt_num(v: float) -> str:
    return str(int(v)) if v == int(v) and abs(v) < 1e16 else repr(v)


def _fmt_str(s: str) -> str:
    return '"' + s.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n").replace("\t", "\\t") + '"'


def _fmt_col(name: str) -> str:
    plain = (_NAME_RE.fullmatch(name) and name not in _KEYWORDS and name not in _FORBIDDEN_WORDS
             and not name.startswith("__"))
    return name if plain else f"`{name}`"


def _wrap(node, min_prec: int) -> str:
    text = _canon(node)
    return f"({text})" if _prec(node) < min_prec else text


def _canon(node) -> str:
    if isinstance(node, Num):
        return _fmt_num(node.value)
    if isinstance(node, Str):
        return _fmt_str(node.value)
    if isinstance(node, Bool):
        return "true" if node.value else "false"
    if isinstance(node, Missing):
        return "missing"
    if isinstance(node, Col):
        return _fmt_col(node.name)
    if isinstance(node, Neg):
        return "-" + _wrap(node.arg, 7)  # '--x' needs no parentheses (which would add nesting)
    if isinstance(node, Not):
        return "not " + _wrap(node.arg, 3)
    if isinstance(node, Pow):
        return f"{_wrap(node.base, 9)} ^ {'-' * (node.exponent < 0)}{_fmt_num(abs(node.exponent))}"
    if isinstance(node, Logic):
        return f" {node.op} ".join(_wrap(a, _prec(node) + 1) for a in node.args)
    if isinstance(node, Arith):
        p = _prec(node)
        return _wrap(node.args[0], p) + "".join(f" {op} {_wrap(a, p + 1)}" for op, a in zip(node.ops, node.args[1:]))
    if isinstance(node, Cmp):
        return f"{_wrap(node.left, 5)} {node.op} {_wrap(node.right, 5)}"
    if isinstance(node, In):
        fmt = {NUM: _fmt_num, STR: _fmt_str, BOOL: lambda b: "true" if b else "false"}[node.kind]
        items = ", ".join(("-" if node.kind == NUM and v < 0 else "") + fmt(abs(v) if node.kind == NUM else v)
                          for v in node.items)
        return f"{_wrap(node.arg, 5)} {'not in' if node.negate else 'in'} [{items}]"
    return f"{node.name}({', '.join(_canon(a) for a in node.args)})"


# --------------------------------------------------------------------------- evaluation

class _Val(NamedTuple):
    kind: str
    data: np.ndarray | None  # float (NaN = missing), bool or object array; None for NULL
    miss: np.ndarray


def _num(data) -> _Val:
    data = np.asarray(data, dtype=float)
    bad = ~np.isfinite(data)
    return _Val(NUM, np.where(bad, np.nan, data) if bad.any() else data, bad)


def _column(src: str, df: pd.DataFrame, node: Col) -> _Val:
    s = df[node.name]
    if isinstance(s, pd.DataFrame):
        raise ExprError(src, f"column '{node.name}' appears more than once in the data", node.pos + 1)
    dtype = s.dtype
    if pd.api.types.is_bool_dtype(dtype):
        miss = s.isna().to_numpy(dtype=bool)
        return _Val(BOOL, s.to_numpy(dtype=bool, na_value=False), miss)
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype):
        return _num(s.to_numpy(dtype=float, na_value=np.nan))
    if isinstance(dtype, pd.CategoricalDtype) or pd.api.types.is_string_dtype(dtype) or dtype == object:
        values = s.astype(object).to_numpy()
        miss = np.asarray(pd.isna(values), dtype=bool)
        found = pd.api.types.infer_dtype(values[~miss], skipna=False)
        if found == "empty":
            return _Val(NULL, None, miss)
        if found == "string":
            return _Val(STR, np.where(miss, "", values).astype(object), miss)
        if found == "boolean":
            return _Val(BOOL, np.where(miss, False, values).astype(bool), miss)
        if found in ("integer", "floating", "mixed-integer-float", "decimal"):
            return _num(np.where(miss, np.nan, values).astype(float))
        raise ExprError(src, f"column '{node.name}' mixes kinds of values ({found})", node.pos + 1,
                        hint="expressions use numbers, text and true/false")
    raise ExprError(src, f"column '{node.name}' has type {dtype}", node.pos + 1,
                    hint="expressions use numbers, text and true/false")


class _Evaluator:
    def __init__(self, src: str, df: pd.DataFrame):
        self.src, self.df, self.n = src, df, len(df)

    def as_kind(self, v: _Val, kind: str) -> _Val:
        if v.kind == kind:
            return v
        if v.kind == NULL:
            empty = {NUM: np.full(self.n, np.nan), BOOL: np.zeros(self.n, bool), STR: np.full(self.n, "", object)}
            return _Val(kind, empty[kind], np.ones(self.n, bool))
        if kind == NUM and v.kind == BOOL:
            return _num(np.where(v.miss, np.nan, v.data.astype(float)))
        raise AssertionError(f"no conversion from {v.kind} to {kind}")  # pragma: no cover - _rule refuses

    def full(self, kind, value) -> _Val:
        return _Val(kind, np.full(self.n, value, dtype={NUM: float, BOOL: bool, STR: object}[kind]),
                    np.zeros(self.n, bool))

    def ev(self, node) -> _Val:
        if isinstance(node, Num):
            return self.full(NUM, node.value)
        if isinstance(node, Str):
            return self.full(STR, node.value)
        if isinstance(node, Bool):
            return self.full(BOOL, node.value)
        if isinstance(node, Missing):
            return _Val(NULL, None, np.ones(self.n, bool))
        if isinstance(node, Col):
            return _column(self.src, self.df, node)
        vals = [self.ev(c) for c in _children(node)]
        kind = _rule(self.src, node, [v.kind for v in vals])
        return getattr(self, "ev_" + type(node).__name__)(node, vals, kind)

    def nums(self, vals):
        return [self.as_kind(v, NUM).data for v in vals]

    def ev_Neg(self, node, vals, kind):
        return _num(-self.nums(vals)[0])

    def ev_Pow(self, node, vals, kind):
        return _num(np.power(self.nums(vals)[0], node.exponent))

    def ev_Arith(self, node, vals, kind):
        data = self.nums(vals)
        acc = data[0]
        for op, nxt in zip(node.ops, data[1:]):
            acc = _num(_ARITH[op](acc, nxt)).data
        return _num(acc)

    def ev_Cmp(self, node, vals, kind):
        fam = _family(v.kind for v in vals)
        a, b = (self.as_kind(v, fam) for v in vals)
        return self.boolean(_COMPARE[node.op](a.data, b.data) & ~a.miss & ~b.miss)

    def ev_In(self, node, vals, kind):
        v = self.as_kind(vals[0], NUM if node.kind == BOOL else node.kind)
        items = [float(x) for x in node.items] if node.kind == BOOL else list(node.items)
        hit = pd.Series(v.data, dtype=object if node.kind == STR else float).isin(items).to_numpy(dtype=bool)
        return self.boolean((~hit if node.negate else hit) & ~v.miss)

    def ev_Not(self, node, vals, kind):
        v = self.as_kind(vals[0], BOOL)
        return _Val(BOOL, ~v.data & ~v.miss, v.miss)

    def ev_Logic(self, node, vals, kind):
        acc = self.as_kind(vals[0], BOOL)
        for nxt in vals[1:]:  # three-valued (Kleene) logic; data is False wherever miss is True
            b = self.as_kind(nxt, BOOL)
            if node.op == "and":
                true = acc.data & b.data
                known = true | (~acc.data & ~acc.miss) | (~b.data & ~b.miss)
            else:
                true = acc.data | b.data
                known = true | ((~acc.data & ~acc.miss) & (~b.data & ~b.miss))
            acc = _Val(BOOL, true, ~known)
        return acc

    def boolean(self, data) -> _Val:
        return _Val(BOOL, np.asarray(data, dtype=bool), np.zeros(self.n, bool))

    def ev_Call(self, node, vals, kind):
        name = node.name
        if name in ("is_missing", "not_missing"):
            return self.boolean(vals[0].miss if name == "is_missing" else ~vals[0].miss)
        if name in ("fill_missing", "if_else"):
            if kind == NULL:
                return vals[-1]
            if name == "fill_missing":
                x, value = (self.as_kind(v, kind) for v in vals)
                take_x = ~x.miss
                miss = x.miss & value.miss
            else:
                cond = self.as_kind(vals[0], BOOL)
                x, value = (self.as_kind(v, kind) for v in vals[1:])
                take_x = cond.data
                miss = cond.miss | np.where(take_x, x.miss, value.miss)
            data = np.where(take_x, x.data, value.data)
            if kind == NUM:
                return _num(np.where(miss, np.nan, data))
            return _Val(kind, np.where(miss, False if kind == BOOL else "", data).astype(x.data.dtype), miss)
        if name in ("lower", "upper"):
            s = self.as_kind(vals[0], STR)
            change = str.lower if name == "lower" else str.upper
            return _Val(STR, np.array([change(t) for t in s.data], dtype=object), s.miss)
        args = self.nums(vals)
        if name in _UNARY_NUMPY:
            return _num(_UNARY_NUMPY[name](args[0]))
        if name == "round":
            return _num(np.round(args[0], int(_literal_number(node.args[1]))))
        if name in ("min", "max"):
            return _num((np.minimum if name == "min" else np.maximum)(args[0], args[1]))
        if name == "between":
            return self.boolean((args[0] >= args[1]) & (args[0] <= args[2]))
        if name == "clip":
            x, lo, hi = args
            return _num(np.where(lo > hi, np.nan, np.minimum(np.maximum(x, lo), hi)))
        # standardize: a z-score over the rows given
        x = args[0]
        ok = ~np.isnan(x)
        if ok.sum() < 2 or np.ptp(x[ok]) == 0:
            raise ExprError(self.src, f"{_canon(node)} is not defined", node.pos + 1,
                            hint="it needs at least two different non-missing values")
        return _num((x - x[ok].mean()) / x[ok].std(ddof=1))


# --------------------------------------------------------------------------- public API

class Expr:
    """A parsed, checked expression. Immutable; equal and hashed by its canonical text."""

    __slots__ = ("source", "_tree", "_kind", "_colpos", "_canonical")

    def __init__(self, source: str, tree, kind: str, colpos: dict):
        for slot, value in zip(self.__slots__, (source, tree, kind, tuple(colpos.items()), _canon(tree))):
            object.__setattr__(self, slot, value)

    def __setattr__(self, name, value):
        raise AttributeError("Expr is immutable")

    def __eq__(self, other):
        return isinstance(other, Expr) and other._canonical == self._canonical

    def __hash__(self):
        return hash(("specflow.Expr", self._canonical))

    def __reduce__(self):
        return (parse, (self.source,))

    def __repr__(self):
        return f"Expr({self.source!r})"

    def columns(self) -> frozenset[str]:
        """The columns the expression references."""
        return frozenset(name for name, _ in self._colpos)

    def is_boolean(self) -> bool:
        """Whether the expression gives true/false, judged from its text alone."""
        return self._kind == BOOL

    def canonical(self) -> str:
        """A normalised text: same for the same tree, whatever the spacing and redundant parentheses."""
        return self._canonical

    def check_columns(self, available: Iterable, known_columns: Iterable[str] | None = None) -> None:
        """Raise ExprError for the first referenced column not in ``available``."""
        present = {c for c in available if isinstance(c, str)}
        for name, pos in self._colpos:
            if name not in present:
                pool = sorted(present | set(known_columns or ()))
                close = difflib.get_close_matches(name, pool, n=1, cutoff=0.6)
                shown = ", ".join(pool[:12]) + (", ..." if len(pool) > 12 else "")
                hint = f"did you mean '{close[0]}'?" if close else (f"columns: {shown}" if pool else "no columns")
                raise ExprError(self.source, f"unknown column '{name}'", pos + 1, name, hint)

    def evaluate(self, df: pd.DataFrame, known_columns: Iterable[str] | None = None) -> pd.Series:
        """Evaluate on every row of ``df``: a float Series (NaN = missing), a bool Series
        (missing counts as false) or a text Series. ``known_columns`` only feed suggestions."""
        if not isinstance(df, pd.DataFrame):
            raise ExprError(self.source, f"can only be evaluated on a pandas DataFrame, not {type(df).__name__}")
        self.check_columns(df.columns, known_columns)
        with np.errstate(all="ignore"):
            v = _Evaluator(self.source, df).ev(self._tree)
        if v.kind == BOOL:
            return pd.Series(v.data & ~v.miss, index=df.index, dtype=bool)
        if v.kind == STR:
            return pd.Series(np.where(v.miss, np.nan, v.data).astype(object), index=df.index)
        return pd.Series(np.full(len(df), np.nan) if v.kind == NULL else v.data, index=df.index, dtype=float)


def parse(source: str) -> Expr:
    """Parse and check ``source``; raises :class:`ExprError` with a one-line message."""
    if not isinstance(source, str):
        raise ExprError(repr(source), f"an expression must be a string, not {type(source).__name__}")
    if len(source) > MAX_LENGTH:
        raise ExprError(source, f"the expression is {len(source)} characters long", hint=f"at most {MAX_LENGTH}")
    tree = _Parser(source).parse()
    colpos: dict[str, int] = {}
    kind = _check(source, tree, 1, colpos)
    return Expr(source, tree, kind, colpos)
