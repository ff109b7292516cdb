"""Property tests of specflow.expr with hypothesis.

1. Random text and random token soup: ``parse`` returns an Expr or raises ExprError, and an Expr
   evaluates or raises ExprError; nothing else escapes (no RecursionError, IndexError, ...).
2. Random well-formed expression trees: the test renders each tree as text and computes its
   value itself with numpy, following the documented rules (the reference); specflow's value
   must equal it, and so must the value of the canonical text.
The data frame is invented for these tests.
"""

import numpy as np
import pandas as pd
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from specflow.expr import Expr, ExprError, parse

FUZZ = settings(max_examples=300, deadline=None)

DF = pd.DataFrame({
    "a": [0.5, -1.0, np.nan, 2.0, 0.0, 1000.0, -0.25, 3.0],
    "b": [1.0, 2.0, 3.0, np.nan, -0.5, 0.0, 1e-3, -7.0],
    "n": [0, 1, -2, 3, 4, 5, 6, -1],
    "p": [True, False, True, True, False, False, True, False],
    "region": ["north", "East", None, "south", "NORTH", "west", "east", "south"],
})


def run(text: str) -> None:
    """Parse and evaluate; only ExprError may escape, and its message is one line."""
    try:
        e = parse(text)
    except ExprError as err:
        assert "\n" not in str(err) and str(err).startswith('expression "')
        return
    assert isinstance(e, Expr)
    again = parse(e.canonical())
    assert again.canonical() == e.canonical() and again == e
    try:
        out = e.evaluate(DF)
    except ExprError as err:
        assert "\n" not in str(err)
        return
    assert isinstance(out, pd.Series) and len(out) == len(DF)
    other = again.evaluate(DF)
    pd.testing.assert_series_equal(out, other)


ALPHABET = "abnpxy()[]+-*/^<>=!,.;:'\" `0123456789e_\\"


@FUZZ
@given(st.text(alphabet=ALPHABET, max_size=60))
def test_random_text_parses_or_is_refused(text):
    run(text)


TOKENS = ["a", "b", "n", "p", "region", "zz", "1", "0", "2.5", "1e3", "1e200", "'north'", '"x"', "(", ")",
          "[", "]", ",", "+", "-", "*", "/", "^", "**", "==", "!=", "<", ">=", " and ", " or ", "not ",
          " in ", " not in ", "log(", "clip(", "if_else(", "round(", "is_missing(", "fill_missing(",
          "standardize(", "lower(", "between(", "min(", "missing", "true", "false", "`a`", "`a b`", " ",
          ".", "__", "lambda"]


@FUZZ
@given(st.lists(st.sampled_from(TOKENS), max_size=40).map("".join))
def test_random_token_soup_parses_or_is_refused(text):
    run(text)


@FUZZ
@given(k=st.integers(1, 1200), pattern=st.sampled_from([
    "({})", "-{}", "not {}", "log({})", "({} + 1)", "[{}]", "{} ^ 2", "if_else(p, {}, 1)", "a in [{}]",
    "{} + a", "(a * {} - 1) ^ 2 == 3 and p or", "x{}", "'{}",
]))
def test_deep_and_long_inputs_never_crash(k, pattern):
    text = "a"
    for _ in range(k):
        text = pattern.format(text)
        if len(text) > 2100:
            break
    run(text)


# ----------------------------------------------------------------- generated trees

class Refused(Exception):
    """The reference says the parser must refuse this tree (crossed literal bounds)."""


NUM_FUNCS = {"log": np.log, "log1p": np.log1p, "exp": np.exp, "sqrt": np.sqrt, "abs": np.abs,
             "square": np.square, "floor": np.floor, "ceil": np.ceil, "asinh": np.arcsinh}
BINARY = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide, "min": np.minimum,
          "max": np.maximum}
COMPARE = {"==": np.equal, "!=": np.not_equal, "<": np.less, "<=": np.less_equal, ">": np.greater,
           ">=": np.greater_equal}
WORDS = ["north", "East", "south", "zz z", "east"]


def fin(x):
    x = np.asarray(x, dtype=float)
    return np.where(np.isfinite(x), x, np.nan)


def fmt(v: float) -> str:
    return f"(-{abs(v)!r})" if v < 0 else repr(float(v))


literals = st.one_of(st.integers(-5, 5).map(float), st.sampled_from([0.5, 2.5, 1e-3, 100.0, 1e6, -0.75]))


def numeric(children, booleans):
    return st.one_of(
        st.tuples(st.just("neg"), children),
        st.tuples(st.just("fn"), st.sampled_from(sorted(NUM_FUNCS)), children),
        st.tuples(st.just("bin"), st.sampled_from(sorted(BINARY)), children, children),
        st.tuples(st.just("pow"), children, st.sampled_from([-3, -2, -1, 0, 1, 2, 3, 0.5, 1.5]),
                  st.sampled_from(["^", "**"])),
        st.tuples(st.just("clip"), children, children, children),
        st.tuples(st.just("round"), children, st.integers(-2, 3)),
        st.tuples(st.just("fill"), children, children),
        st.tuples(st.just("ifelse"), booleans, children, children),
    )


def boolean_over(nums):
    base = st.one_of(
        st.tuples(st.just("cmp"), st.sampled_from(sorted(COMPARE)), nums, nums),
        st.tuples(st.just("between"), nums, nums, nums),
        st.tuples(st.just("miss"), st.booleans(), nums),
        st.tuples(st.just("in"), st.booleans(), nums, st.lists(st.integers(-3, 5), min_size=1, max_size=4)),
        st.tuples(st.just("bcol")), st.tuples(st.just("blit"), st.booleans()),
        st.tuples(st.just("str_eq"), st.sampled_from(["==", "!="]), st.booleans(), st.sampled_from(WORDS)),
        st.tuples(st.just("str_in"), st.booleans(), st.lists(st.sampled_from(WORDS), min_size=1, max_size=3)),
    )
    return st.recursive(base, lambda b: st.one_of(
        st.tuples(st.sampled_from(["and", "or"]), b, b), st.tuples(st.just("not"), b)), max_leaves=4)


leaves = st.one_of(st.sampled_from(["a", "b", "n"]).map(lambda c: ("col", c)), literals.map(lambda v: ("lit", v)))
simple_booleans = boolean_over(leaves)
num_trees = st.recursive(leaves, lambda kids: numeric(kids, simple_booleans), max_leaves=10)
bool_trees = boolean_over(num_trees)


def depth(t) -> int:
    return 1 + max((depth(c) for c in t[1:] if isinstance(c, tuple)), default=0)


def render(t) -> str:
    kind = t[0]
    if kind == "col":
        return t[1]
    if kind == "lit":
        return fmt(t[1])
    if kind == "neg":
        return f"(-{render(t[1])})"
    if kind == "fn":
        return f"{t[1]}({render(t[2])})"
    if kind == "bin":
        op, left, right = t[1:]
        return f"{op}({render(left)}, {render(right)})" if op in ("min", "max") else f"({render(left)} {op} {render(right)})"
    if kind == "pow":
        return f"({render(t[1])} {t[3]} {t[2]})"
    if kind == "clip":
        return f"clip({render(t[1])}, {render(t[2])}, {render(t[3])})"
    if kind == "round":
        return f"round({render(t[1])}, {t[2]})"
    if kind == "fill":
        return f"fill_missing({render(t[1])}, {render(t[2])})"
    if kind == "ifelse":
        return f"if_else({render(t[1])}, {render(t[2])}, {render(t[3])})"
    if kind == "cmp":
        return f"({render(t[2])} {t[1]} {render(t[3])})"
    if kind == "between":
        return f"between({render(t[1])}, {render(t[2])}, {render(t[3])})"
    if kind == "miss":
        return f"{'is_missing' if t[1] else 'not_missing'}({render(t[2])})"
    if kind == "in":
        return f"({render(t[2])} {'not in' if t[1] else 'in'} [{', '.join(map(str, t[3]))}])"
    if kind == "bcol":
        return "p"
    if kind == "blit":
        return "true" if t[1] else "false"
    if kind == "str_eq":
        return f"({'lower(region)' if t[2] else 'region'} {t[1]} '{t[3]}')"
    if kind == "str_in":
        return f"(region {'not in' if t[1] else 'in'} [{', '.join(repr(w) for w in t[2])}])"
    if kind in ("and", "or"):
        return f"({render(t[1])} {kind} {render(t[2])})"
    return f"(not {render(t[1])})"


def literal_value(t):
    """A bound the parser sees as a number literal: a literal, or '-' before one."""
    if t[0] == "neg" and t[1][0] == "lit":
        return -t[1][1]
    return t[1] if t[0] == "lit" else None


def reference(t, df=DF):
    """The value of tree ``t`` on ``df`` by the documented rules, with numpy."""
    kind, r = t[0], (lambda u: reference(u, df))
    if kind == "col":
        return fin(df[t[1]].to_numpy(dtype=float))
    if kind == "lit":
        return np.full(len(df), t[1])
    if kind == "neg":
        return fin(-r(t[1]))
    if kind == "fn":
        return fin(NUM_FUNCS[t[1]](r(t[2])))
    if kind == "bin":
        return fin(BINARY[t[1]](r(t[2]), r(t[3])))
    if kind == "pow":
        return fin(np.power(r(t[1]), float(t[2])))
    if kind in ("clip", "between"):
        lo, hi = literal_value(t[2]), literal_value(t[3])
        if lo is not None and hi is not None and lo > hi:
            raise Refused
        x, lo, hi = r(t[1]), r(t[2]), r(t[3])
        if kind == "between":
            return (x >= lo) & (x <= hi)
        out = np.clip(x, lo, hi)
        out[lo > hi] = np.nan  # documented: crossed bounds give missing
        return fin(out)
    if kind == "round":
        return fin(np.round(r(t[1]), t[2]))
    if kind == "fill":
        x = r(t[1])
        return np.where(np.isnan(x), r(t[2]), x)
    if kind == "ifelse":
        return np.where(r(t[1]), r(t[2]), r(t[3]))
    if kind == "cmp":
        left, right = r(t[2]), r(t[3])
        return COMPARE[t[1]](left, right) & ~np.isnan(left) & ~np.isnan(right)
    if kind == "miss":
        m = np.isnan(r(t[2]))
        return m if t[1] else ~m
    if kind == "in":
        x = r(t[2])
        hit = np.array([v in set(t[3]) for v in x])
        return (~hit if t[1] else hit) & ~np.isnan(x)
    if kind == "bcol":
        return df["p"].to_numpy(dtype=bool)
    if kind == "blit":
        return np.full(len(df), t[1])
    if kind in ("str_eq", "str_in"):
        values = [None if v is None or v != v else v for v in df["region"].astype(object)]
        if kind == "str_eq" and t[2]:
            values = [None if v is None else v.lower() for v in values]
        if kind == "str_eq":
            test = (lambda v: v == t[3]) if t[1] == "==" else (lambda v: v != t[3])
        else:
            test = (lambda v: v not in t[2]) if t[1] else (lambda v: v in t[2])
        return np.array([v is not None and test(v) for v in values])
    if kind == "and":
        return r(t[1]) & r(t[2])
    if kind == "or":
        return r(t[1]) | r(t[2])
    return ~r(t[1])


def check_tree(tree):
    assume(depth(tree) <= 12)
    text = render(tree)
    try:
        with np.errstate(all="ignore"):
            expected = reference(tree)
    except Refused:
        try:
            parse(text)
        except ExprError as err:
            assert "above upper bound" in str(err)
            return
        raise AssertionError(f"{text!r} should have been refused")
    e = parse(text)
    got = e.evaluate(DF)
    np.testing.assert_array_equal(got.to_numpy(dtype=float), np.asarray(expected, dtype=float), err_msg=text)
    canon = parse(e.canonical())
    assert canon.canonical() == e.canonical()
    np.testing.assert_array_equal(canon.evaluate(DF).to_numpy(dtype=float), np.asarray(expected, dtype=float),
                                  err_msg=e.canonical())
    return e


@FUZZ
@given(num_trees)
def test_generated_numeric_expressions_match_numpy(tree):
    e = check_tree(tree)
    if e is not None:
        assert e.evaluate(DF).dtype == np.float64 or not e.columns()


@FUZZ
@given(bool_trees)
def test_generated_filters_match_numpy(tree):
    e = check_tree(tree)
    if e is not None:
        assert e.is_boolean() or tree == ("bcol",)  # a bare column's kind is known only from data
        assert e.evaluate(DF).dtype == bool
