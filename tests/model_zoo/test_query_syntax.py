"""Probability notation: parsing, levels, errors, and the format -> parse round trip."""

from __future__ import annotations

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from model_zoo.base import Level, Query
from model_zoo.errors import InputError
from model_zoo.query_syntax import format_query, parse_query

ASIA = {v: ("yes", "no") for v in ("asia", "tub", "smoke", "lung", "bronc", "either", "xray",
                                   "dysp")}


def test_associational_with_state_names():
    """Asia's query of Lauritzen & Spiegelhalter 1988 maps names to indices."""
    q = parse_query("P(lung=yes | dysp=yes, smoke=yes)", states=ASIA)
    assert q == Query(Level.ASSOCIATIONAL, (("lung", 0),), (("dysp", 0), ("smoke", 0)))


def test_indices_are_accepted_when_in_range():
    q = parse_query("P(lung=1 | smoke=0)", states=ASIA)
    assert q.target == (("lung", 1),) and q.evidence == (("smoke", 0),)


@pytest.mark.parametrize("text,level,target,evidence,do", [
    ("P(Y=1)", Level.ASSOCIATIONAL, (("Y", 1),), (), ()),
    ("P(Y=1 | Z=0)", Level.ASSOCIATIONAL, (("Y", 1),), (("Z", 0),), ()),
    ("P(Y=1 | do(X=0), Z=1)", Level.INTERVENTIONAL, (("Y", 1),), (("Z", 1),), (("X", 0),)),
    ("P(Y=1|Z=1,do(X=0))", Level.INTERVENTIONAL, (("Y", 1),), (("Z", 1),), (("X", 0),)),
    ("P(Y_{X=1}=1 | X=0, Y=0)", Level.COUNTERFACTUAL, (("Y", 1),), (("X", 0), ("Y", 0)),
     (("X", 1),)),
    ("P( Y_{ X = 1 } = 1 )", Level.COUNTERFACTUAL, (("Y", 1),), (), (("X", 1),)),
    ("P(my_var_{X=1}=0)", Level.COUNTERFACTUAL, (("my_var", 0),), (), (("X", 1),)),
])
def test_levels_are_read_off_the_notation(text, level, target, evidence, do):
    """do(...) -> interventional, a subscript -> counterfactual (Pearl 2009, 1.3 and 7.1)."""
    q = parse_query(text)
    assert (q.level, q.target, q.evidence, q.intervention) == (level, target, evidence, do)
    assert q.kind == "probability"


def test_expectation_and_exceedance_on_continuous_models():
    q = parse_query("E(Y | do(X=1))", continuous=True)
    assert q.kind == "expectation" and q.level is Level.INTERVENTIONAL
    assert q.intervention == (("X", 1.0),)
    q = parse_query("P(Y > 0.5 | X=1)", continuous=True, variables=["X", "Y"])
    assert q.kind == "exceedance" and q.target == (("Y", 0.5),) and q.evidence == (("X", 1.0),)
    q = parse_query("E(Y_{H=2} | X=0.5, H=1, Y=1.5)", continuous=True)
    assert q.level is Level.COUNTERFACTUAL and q.intervention == (("H", 2.0),)


def test_quoted_names():
    q = parse_query("P('heart rate'=\"very high\")", states={"heart rate": ("low", "very high")})
    assert q.target == (("heart rate", 1),)


@pytest.mark.parametrize("text,position", [
    ("P(Y=1", 6),
    ("P(Y=1 | do(X=0)", 16),
    ("Q(Y=1)", 1),
    ("P(Y=1))", 7),
    ("P(Y 1)", 5),
    ("", 1),
    ("P(Y=1 | )", 9),
])
def test_syntax_errors_name_the_position(text, position):
    with pytest.raises(InputError, match=rf"position {position}:"):
        parse_query(text)


def test_unknown_variable_lists_valid_ones():
    with pytest.raises(InputError) as info:
        parse_query("P(lungs=yes | smoke=yes)", states=ASIA)
    msg = str(info.value)
    assert "'lungs'" in msg and "P(lungs=yes | smoke=yes)" in msg and "lung" in msg


def test_unknown_state_lists_valid_ones():
    with pytest.raises(InputError) as info:
        parse_query("P(lung=maybe)", states=ASIA)
    msg = str(info.value)
    assert "'maybe'" in msg and "yes, no" in msg


@pytest.mark.parametrize("text", [
    "P(lung=2)",                         # index out of range
    "P(Y_{X=1}=1, Z=0)",                 # one target subscripted, one not
    "P(Y_{X=1}=1 | do(X=0))",            # subscript and do together
    "P(Y=1 | Z=0, Z=1)",                 # evidence twice
    "P(Y>0.5, Z=1)",                     # mixed relations
])
def test_queries_the_notation_cannot_hold(text):
    states = dict(ASIA, Y=("a", "b"), Z=("a", "b"), X=("a", "b"))
    with pytest.raises(InputError):
        parse_query(text, states=states)


def test_names_need_states_or_indices():
    with pytest.raises(InputError, match="state index"):
        parse_query("P(Y=yes)")
    with pytest.raises(InputError, match="finite number"):
        parse_query("E(Y | X=nan)", continuous=True)


def test_no_evaluation_of_the_text():
    """The parser is a tokeniser, not eval: code-looking input is just a bad query."""
    with pytest.raises(InputError):
        parse_query("__import__('os').system('true')")


def test_format_uses_state_names():
    q = Query(Level.INTERVENTIONAL, (("lung", 0),), (("smoke", 1),), (("asia", 0),))
    assert format_query(q, ASIA) == "P(lung=yes | do(asia=yes), smoke=no)"
    assert format_query(q) == "P(lung=0 | do(asia=0), smoke=1)"


# -- properties -----------------------------------------------------------------------------------
_names = st.text(st.characters(codec="utf-8", exclude_characters="\x00"), min_size=1, max_size=6)
_plain = st.from_regex(r"[A-Za-z][A-Za-z0-9_]{0,5}", fullmatch=True)


@st.composite
def discrete_queries(draw):
    names = draw(st.lists(st.one_of(_plain, _names), min_size=3, max_size=6, unique=True))
    states = {v: tuple(draw(st.lists(st.one_of(_plain, _names), min_size=1, max_size=4,
                                     unique=True))) for v in names}

    def assign(vs):
        return tuple((v, draw(st.integers(0, len(states[v]) - 1))) for v in vs)

    def distinct(k):
        return draw(st.lists(st.sampled_from(names), min_size=k, max_size=k + 1, unique=True))

    level = draw(st.sampled_from(list(Level)))
    target = assign(distinct(1))
    evidence = assign(draw(st.lists(st.sampled_from(names), max_size=3, unique=True)))
    intervention = () if level is Level.ASSOCIATIONAL else assign(distinct(1))
    return Query(level, target, evidence, intervention), states


@settings(max_examples=100, suppress_health_check=[HealthCheck.too_slow])
@given(discrete_queries())
def test_format_then_parse_round_trips(case):
    """parse(format(q)) == q for any discrete query, whatever characters the names hold."""
    q, states = case
    text = format_query(q, states)
    assert parse_query(text, states=states) == q
    by_index = parse_query(format_query(q), states=states)
    # By indices too, except where a state is *named* like another state's index: a name takes
    # precedence over an index (documented in parse_query), so "A=0" then means that state.
    shadowed = any(str(x) in states[v] and states[v].index(str(x)) != x
                   for part in (q.target, q.evidence, q.intervention) for v, x in part)
    if not shadowed:
        assert by_index == q


@settings(max_examples=100)
@given(st.sampled_from(list(Level)),
       st.lists(st.tuples(_plain, st.floats(allow_nan=False, allow_infinity=False)),
                min_size=1, max_size=3, unique_by=lambda t: t[0]),
       st.sampled_from(["expectation", "exceedance", "probability"]))
def test_continuous_round_trip(level, pairs, kind):
    target, rest = pairs[:1], tuple(pairs[1:])
    do = rest[:1] if level is not Level.ASSOCIATIONAL else ()
    evidence = rest[1:] if do else rest
    if level is not Level.ASSOCIATIONAL and not do:
        do = (("do_var", 1.5),)
    if kind == "expectation":
        target = [(target[0][0], 0.0)]
    q = Query(level, tuple(target), tuple(evidence), tuple(do), kind=kind)
    assert parse_query(format_query(q), continuous=True) == q


@settings(max_examples=500)
@given(st.text(max_size=40))
def test_garbage_raises_input_error_only(text):
    """Any string either parses or raises InputError — never another exception."""
    try:
        parse_query(text, states=ASIA)
    except InputError:
        pass


@settings(max_examples=300)
@given(st.lists(st.sampled_from(["P", "E", "MPE", "(", ")", "|", ",", "=", ">", "do", "_{", "}",
                                 "lung", "smoke", "yes", "0", "1", "2.5", "'", " "]),
                max_size=25).map("".join))
def test_near_miss_token_soup_raises_input_error_only(text):
    """Strings made of the grammar's own tokens parse or raise InputError only."""
    for kwargs in ({"states": ASIA}, {"continuous": True}, {}):
        try:
            parse_query(text, **kwargs)
        except InputError:
            pass


def test_a_state_named_like_an_index_wins_over_the_index():
    """Found by the round-trip property: with states ('A', '0'), "A=0" means the state named
    '0' (index 1), as parse_query documents; indices are the fallback for unnamed values."""
    states = {"A": ("A", "0")}
    assert parse_query("P(A=0)", states=states).target == (("A", 1),)
    assert parse_query("P(A=A)", states=states).target == (("A", 0),)
