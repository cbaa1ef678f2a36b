"""Probability notation for queries: parse ``P(Y=1 | do(X=0), Z=1)`` into a :class:`Query` and back.

Grammar (whitespace is free between tokens)::

    query     := OP "(" head? ( "|" condition ( "," condition )* )? ")"
    OP        := "P" | "E" | "MPE"
    head      := atom ( "," atom )*
    atom      := NAME subscript? ( ( "=" | ">" ) VALUE )?      -- no value after E(...)
    subscript := "_{" NAME "=" VALUE ( "," NAME "=" VALUE )* "}"
    condition := "do" "(" NAME "=" VALUE ( "," NAME "=" VALUE )* ")"  |  NAME "=" VALUE

A NAME or VALUE is a run of characters other than blanks and ``( ) | , = > { } ' "``, or a quoted
string (``'my var'``, with ``\\'`` and ``\\\\`` escapes) for names that contain those characters.

The level is read off the notation: a subscripted target (``Y_{X=1}``, Pearl's counterfactual
notation) is counterfactual, a ``do(...)`` is interventional, anything else associational
(Pearl 2009, *Causality*, sections 1.3 and 7.1). ``P(Y > t | ...)`` is an exceedance query,
``E(Y | ...)`` an expectation, ``MPE( | evidence)`` a most-probable-explanation query.

Values of discrete variables are state names (mapped to indices through ``states``) or state
indices; values of continuous variables are finite numbers. The parser is a hand-written
tokeniser and recursive descent; it never evaluates the text.

>>> q = parse_query("P(lung=yes | dysp=yes, smoke=yes)",
...                 states={"lung": ("yes", "no"), "dysp": ("yes", "no"), "smoke": ("yes", "no")})
>>> q.level.value, q.target, q.evidence
('associational', (('lung', 0),), (('dysp', 0), ('smoke', 0)))
>>> format_query(q, {"lung": ("yes", "no"), "dysp": ("yes", "no"), "smoke": ("yes", "no")})
'P(lung=yes | dysp=yes, smoke=yes)'
"""

from __future__ import annotations

import math
import numbers
import re
from dataclasses import dataclass
from typing import Any, Iterable, Mapping, Sequence

from model_zoo.base import Level, Query
from model_zoo.errors import InputError

__all__ = ["parse_query", "format_query"]

_SPECIAL = set("()|,=>{}'\"")
_WORD = re.compile(r"[^\s()|,=>{}'\"]+")
_PLAIN = re.compile(r"[^\s()|,=>{}'\"\\]+")
_INT = re.compile(r"[+-]?\d+")
_KINDS = ("probability", "expectation", "exceedance", "likelihood", "mpe")


@dataclass(frozen=True)
class _Token:
    kind: str          # "word", "quoted", "sub" (the "_{" of a subscript), or the character itself
    text: str
    pos: int           # 0-based offset in the query text

    def shown(self) -> str:
        return "end of text" if self.kind == "end" else repr(self.text)


def _fail(text: str, pos: int, expected: str, got: str) -> InputError:
    return InputError(f"query {text!r}: position {pos + 1}: expected {expected}, got {got}")


def _tokens(text: str) -> list[_Token]:
    """Split ``text`` into tokens; ``O(len(text))``."""
    out: list[_Token] = []
    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c.isspace():
            i += 1
        elif c in "'\"":
            j, buf = i + 1, []
            while j < n and text[j] != c:
                if text[j] == "\\" and j + 1 < n:
                    j += 1
                buf.append(text[j])
                j += 1
            if j >= n:
                raise _fail(text, i, f"a closing {c}", "end of text")
            out.append(_Token("quoted", "".join(buf), i))
            i = j + 1
        elif c in _SPECIAL:
            out.append(_Token(c, c, i))
            i += 1
        else:
            m = _WORD.match(text, i)
            word = m.group(0)
            end = m.end()
            # "Y_{" : the underscore belongs to the subscript, not to the name
            if word.endswith("_") and end < n and text[end] == "{":
                if len(word) > 1:
                    out.append(_Token("word", word[:-1], i))
                out.append(_Token("sub", "_{", end - 1))
                i = end + 1
                continue
            out.append(_Token("word", word, i))
            i = end
    out.append(_Token("end", "", n))
    return out


class _Parser:
    """Recursive descent over the token list; every method consumes what it recognises."""

    def __init__(self, text: str, states: Mapping[str, Sequence[str]] | None,
                 variables: set[str] | None, continuous: bool, kind: str) -> None:
        self.text = text
        self.toks = _tokens(text)
        self.i = 0
        self.states = states
        self.variables = variables
        self.continuous = continuous
        self.kind = kind

    # -- token helpers ------------------------------------------------------------------------
    def peek(self, k: int = 0) -> _Token:
        return self.toks[min(self.i + k, len(self.toks) - 1)]

    def take(self, kind: str, expected: str) -> _Token:
        tok = self.peek()
        if tok.kind != kind:
            raise _fail(self.text, tok.pos, expected, tok.shown())
        self.i += 1
        return tok

    def take_name(self, expected: str = "a variable name") -> _Token:
        tok = self.peek()
        if tok.kind not in ("word", "quoted"):
            raise _fail(self.text, tok.pos, expected, tok.shown())
        self.i += 1
        return tok

    # -- checks against the model -------------------------------------------------------------
    def variable(self, tok: _Token) -> str:
        name = tok.text
        known = self.variables
        if known is not None and name not in known:
            raise InputError(f"query {self.text!r}: unknown variable {name!r} at position "
                             f"{tok.pos + 1} (valid: {_brief(sorted(known))})")
        return name

    def value(self, var: str, tok: _Token, *, numeric: bool = False) -> Any:
        raw = tok.text
        if self.continuous or numeric:
            try:
                x = float(raw)
            except ValueError:
                x = math.nan
            if tok.kind != "word" or not math.isfinite(x):
                raise _fail(self.text, tok.pos, f"a finite number for {var!r}", repr(raw))
            return x
        names = None if self.states is None else self.states.get(var)
        if names is not None:
            names = tuple(names)
            if raw in names:                  # a state name takes precedence over an index
                return names.index(raw)
            if tok.kind == "word" and _INT.fullmatch(raw) and 0 <= int(raw) < len(names):
                return int(raw)
            raise InputError(f"query {self.text!r}: variable {var!r} has no state {raw!r} "
                             f"at position {tok.pos + 1} (valid: {_brief(names)}"
                             f" or an index 0..{len(names) - 1})")
        if tok.kind == "word" and _INT.fullmatch(raw) and int(raw) >= 0:
            return int(raw)
        raise _fail(self.text, tok.pos, f"a state index (an integer >= 0) for {var!r}",
                    repr(raw))

    # -- grammar ------------------------------------------------------------------------------
    def assignment(self) -> tuple[str, Any]:
        var = self.variable(self.take_name())
        self.take("=", f"'=' after {var!r}")
        return var, self.value(var, self.take_name(f"a value for {var!r}"))

    def assignments(self, closer: str) -> list[tuple[str, Any]]:
        pairs = [self.assignment()]
        while self.peek().kind == ",":
            self.i += 1
            pairs.append(self.assignment())
        self.take(closer, f"',' or {closer!r}")
        return pairs

    def query(self) -> Query:
        op_tok = self.take("word", "'P', 'E' or 'MPE'")
        op = op_tok.text
        if op not in ("P", "E", "MPE"):
            raise _fail(self.text, op_tok.pos, "'P', 'E' or 'MPE'", repr(op))
        self.take("(", f"'(' after {op!r}")
        head: list[tuple[str, Any, str | None]] = []   # (variable, value, relation)
        subs: list[tuple[tuple[str, Any], ...] | None] = []
        if not (op == "MPE" and self.peek().kind in ("|", ")")):
            while True:
                var_tok = self.take_name()
                var = self.variable(var_tok)
                sub = None
                if self.peek().kind == "sub":
                    self.i += 1
                    sub = tuple(self.assignments("}"))
                rel_tok = self.peek()
                if op == "E":
                    head.append((var, 0.0, None))
                elif rel_tok.kind in ("=", ">"):
                    self.i += 1
                    val_tok = self.take_name(f"a value for {var!r}")
                    numeric = rel_tok.kind == ">"
                    head.append((var, self.value(var, val_tok, numeric=numeric), rel_tok.kind))
                else:
                    raise _fail(self.text, rel_tok.pos, f"'=' or '>' after {var!r}",
                                rel_tok.shown())
                subs.append(sub)
                if self.peek().kind != ",":
                    break
                self.i += 1
        evidence: list[tuple[str, Any]] = []
        do: list[tuple[str, Any]] = []
        if self.peek().kind == "|":
            self.i += 1
            while True:
                tok = self.peek()
                if tok.kind == "word" and tok.text == "do" and self.peek(1).kind == "(":
                    self.i += 2
                    do.extend(self.assignments(")"))
                else:
                    evidence.append(self.assignment())
                if self.peek().kind != ",":
                    break
                self.i += 1
        self.take(")", "',' or ')'" if evidence or do else "'|' or ')'")
        end = self.peek()
        if end.kind != "end":
            raise _fail(self.text, end.pos, "end of text", end.shown())
        return self.build(op, op_tok, head, subs, evidence, do)

    def build(self, op: str, op_tok: _Token, head, subs, evidence, do) -> Query:
        text = self.text
        relations = {rel for _, _, rel in head if rel is not None}
        if len(relations) > 1:
            raise InputError(f"query {text!r}: mixes '=' and '>' in the target; ask one kind "
                             "of question at a time")
        if op == "E":
            kind = "expectation"
        elif op == "MPE":
            kind = "mpe"
        elif relations == {">"}:
            kind = "exceedance"
        else:
            kind = self.kind
        given = [s for s in subs if s is not None]
        if given:
            if len(given) != len(subs) or any(s != given[0] for s in given):
                raise InputError(f"query {text!r}: every target must carry the same "
                                 "subscript _{...} (one hypothetical world per query)")
            if do:
                raise InputError(f"query {text!r}: a counterfactual puts its intervention in "
                                 "the subscript _{...}, not in do(...)")
            level, intervention = Level.COUNTERFACTUAL, given[0]
        elif do:
            level, intervention = Level.INTERVENTIONAL, tuple(do)
        else:
            level, intervention = Level.ASSOCIATIONAL, ()
        for part, label in ((intervention, "intervention"), (tuple(evidence), "evidence"),
                            (tuple((v, x) for v, x, _ in head), "target")):
            seen: set[str] = set()
            for v, _ in part:
                if v in seen:
                    raise InputError(f"query {text!r}: variable {v!r} appears twice in the "
                                     f"{label}")
                seen.add(v)
        return Query(level=level, target=tuple((v, x) for v, x, _ in head),
                     evidence=tuple(evidence), intervention=tuple(intervention), kind=kind)


def _brief(names: Sequence[str], limit: int = 8) -> str:
    shown = ", ".join(str(n) for n in names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


def parse_query(text: str, *, states: Mapping[str, Sequence[str]] | None = None,
                continuous: bool = False, kind: str = "probability",
                variables: Iterable[str] | None = None) -> Query:
    """Parse probability notation into a :class:`~model_zoo.base.Query`.

    Parameters
    ----------
    text
        E.g. ``"P(Y=1)"``, ``"P(Y=1 | Z=0)"``, ``"P(Y=1 | do(X=0), Z=1)"``,
        ``"P(Y_{X=1}=1 | X=0, Y=0)"``, ``"E(Y | do(X=1))"``, ``"P(Y > 0.5 | X=1)"``.
    states
        State names of each discrete variable. Names map to indices; an index in range is
        accepted too (a state *named* like an index wins). Its keys are the valid variables.
    continuous
        Values are finite numbers (linear SCMs) rather than states.
    kind
        The ``Query.kind`` of a ``P(... = ...)`` query: ``"probability"`` (default) or
        ``"likelihood"``. ``E``, ``MPE`` and ``>`` set the kind themselves.
    variables
        Valid variable names when ``states`` is not given (e.g. for continuous models).

    Returns
    -------
    Query
        With the level read off the notation.

    Raises
    ------
    InputError
        On a syntax error (with the 1-based position), an unknown variable or state (listing
        valid ones), or a query the notation cannot hold (mixed subscripts). Never anything else.

    Notes
    -----
    ``O(len(text))`` plus ``O(states)`` per value looked up.
    """
    if not isinstance(text, str):
        raise InputError.at("query", None, "a string such as 'P(Y=1 | X=0)'", text)
    if kind not in _KINDS:
        raise InputError.at("query", "kind", "one of " + ", ".join(_KINDS), kind)
    known = set(states) if states is not None else (
        set(variables) if variables is not None else None)
    return _Parser(text, states, known, continuous, kind).query()


def _quote(name: str) -> str:
    name = str(name)
    if _PLAIN.fullmatch(name) and not name.endswith("_"):
        return name
    return "'" + name.replace("\\", "\\\\").replace("'", "\\'") + "'"


def _name(var: str) -> str:
    q = _quote(var)
    return q if q != "do" else "'do'"


def _value_text(var: str, value: Any, states: Mapping[str, Sequence[str]] | None) -> str:
    names = None if states is None else states.get(var)
    if isinstance(value, bool):
        value = int(value)
    if names is not None and isinstance(value, numbers.Integral) and 0 <= value < len(names):
        return _quote(names[int(value)])
    if isinstance(value, float):
        return repr(value)
    return _quote(str(value))


def format_query(query: Query, states: Mapping[str, Sequence[str]] | None = None) -> str:
    """Probability notation for ``query``, with state names when ``states`` is given.

    The inverse of :func:`parse_query`: ``parse_query(format_query(q, s), states=s) == q``
    for discrete queries (and with ``continuous=True`` for continuous ones). ``O(size of q)``.
    """
    def pairs(assign) -> str:
        return ", ".join(f"{_name(v)}={_value_text(v, x, states)}" for v, x in assign)

    cf = query.level is Level.COUNTERFACTUAL
    sub = ("_{" + pairs(query.intervention) + "}") if cf else ""
    if query.kind == "expectation":
        head = ", ".join(f"{_name(v)}{sub}" for v, _ in query.target)
    elif query.kind == "exceedance":
        head = ", ".join(f"{_name(v)}{sub} > {float(x)!r}" for v, x in query.target)
    else:
        head = ", ".join(f"{_name(v)}{sub}={_value_text(v, x, states)}" for v, x in query.target)
    parts = []
    if query.intervention and not cf:
        parts.append(f"do({pairs(query.intervention)})")
    if query.evidence:
        parts.append(pairs(query.evidence))
    op = {"expectation": "E", "mpe": "MPE"}.get(query.kind, "P")
    tail = ", ".join(parts)
    return f"{op}({head} | {tail})" if tail else f"{op}({head})"
