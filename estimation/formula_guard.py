"""The allow-list every covariate formula passes before anything evaluates it.

A formula's right-hand side is tokenised with Python's own tokenizer (the one patsy uses),
and every token must be one of

* a data column name (or, followed by ``(``, one of ``ALLOWED_FUNCTIONS``);
* a plain decimal number (``1``, ``0``, ``2.5``, ``1e-3``);
* an operator of the formula language: ``+ - * / ** :`` and parentheses.

``C(...)`` takes one column; ``I(...)`` takes arithmetic of columns and numbers only (no
calls); ``center``, ``standardize``, ``scale``, ``log`` and ``exp`` take one argument made
of columns, numbers, arithmetic and these transforms. ``:`` (interaction) is allowed only
outside function calls. Anything else -- strings, attribute access (``.``), subscripts,
keywords (``lambda``, ``import``, ...), dunder names, commas, unlisted functions, names that
are not columns -- is refused with a StopwiseInputError naming the offending token.

What then reaches patsy's evaluator is built from column names, the listed functions,
numbers, arithmetic and parentheses only, so no formula string can run code; patsy is, in
addition, handed ``safe_namespace()``, in which every Python builtin name is shadowed.
"""

from __future__ import annotations

import builtins
import io
import keyword
import re
import token
import tokenize
import unicodedata
from collections.abc import Iterable

import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError

TRANSFORMS = ("center", "standardize", "scale", "log", "exp")
ALLOWED_FUNCTIONS = ("C", "I", *TRANSFORMS)
FORMULA_OPERATORS = frozenset({"+", "-", "*", "/", "**", ":", "(", ")"})
CALL_OPERATORS = frozenset({"+", "-", "*", "/", "**", "(", ")"})
DECIMAL_NUMBER = re.compile(r"^(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
SKIPPED_TOKENS = frozenset({token.NEWLINE, token.NL, token.ENDMARKER, token.INDENT, token.DEDENT})
ALLOWED_TEXT = (
    "column names, numbers, + - * / ** : ( ), C(column), I(arithmetic), "
    "center(), standardize(), scale(), log(), exp()"
)


def _refuse(formula: str, what: str) -> StopwiseInputError:
    """The error for one refused token (formula quoted, allow-list stated)."""
    return StopwiseInputError(
        f"formula {formula!r}: {what}; a formula may contain only {ALLOWED_TEXT}"
    )


def check_parentheses(rhs: str, formula: str) -> None:
    """Every ')' closes an earlier '(' and every '(' is closed."""
    depth = 0
    for char in rhs:
        depth += {"(": 1, ")": -1}.get(char, 0)
        if depth < 0:
            raise _refuse(formula, "a ')' closes no '('")
    if depth:
        raise _refuse(formula, "a '(' is never closed")


def formula_tokens(rhs: str, formula: str) -> list[tokenize.TokenInfo]:
    """Python tokens of ``rhs`` (layout tokens and stray blanks dropped); unbalanced
    parentheses or an untokenisable text are refused."""
    check_parentheses(rhs, formula)
    try:
        tokens = list(tokenize.generate_tokens(io.StringIO(rhs.strip()).readline))
    except (tokenize.TokenError, SyntaxError) as exc:
        raise _refuse(formula, f"cannot be read ({exc.args[0]})") from None
    return [
        t
        for t in tokens
        if t.type not in SKIPPED_TOKENS and not (t.type == token.ERRORTOKEN and t.string.isspace())
    ]


def _check_name(name: str, is_call: bool, columns: frozenset[str], formula: str) -> None:
    """A name token: a listed function when called, else a data column."""
    if unicodedata.normalize("NFKC", name) != name:
        raise _refuse(formula, f"the name {name!r} holds characters Python would rewrite")
    if keyword.iskeyword(name):
        raise _refuse(formula, f"the keyword {name!r} is not allowed")
    if name.startswith("__") or name.endswith("__"):
        raise _refuse(formula, f"the name {name!r} is not allowed (double underscores)")
    if is_call:
        if name not in ALLOWED_FUNCTIONS:
            raise _refuse(formula, f"the function {name!r} is not allowed")
        return
    if name not in columns:
        known = ", ".join(sorted(columns)) or "(none)"
        raise _refuse(formula, f"{name!r} is not a data column (known covariate columns: {known})")


def _check_operator(op: str, enclosing: list[str], formula: str) -> None:
    """An operator token: the formula operators outside calls, arithmetic inside them."""
    inside_call = any(kind != "group" for kind in enclosing)
    allowed = CALL_OPERATORS if inside_call else FORMULA_OPERATORS
    if op not in allowed:
        where = " inside a function call" if inside_call else ""
        raise _refuse(formula, f"the operator {op!r}{where} is not allowed")


def _check_call_content(
    tok: tokenize.TokenInfo, enclosing: list[str], formula: str, is_call: bool
) -> None:
    """What a call admits: I() no calls, C() one column and nothing else."""
    if not enclosing:
        return
    innermost = enclosing[-1]
    if "I" in enclosing and is_call:
        raise _refuse(formula, f"I() takes arithmetic only, not the call {tok.string}()")
    if innermost == "C" and not (tok.type == token.NAME and not is_call):
        raise _refuse(formula, f"C() takes one column name, not {tok.string!r}")


def check_formula_rhs(rhs: str, columns: Iterable[str], formula: str | None = None) -> None:
    """Refuse ``rhs`` unless every token is on the allow-list (module docstring).

    ``columns`` are the data columns the formula may read; ``formula`` is the full text
    quoted in messages (default ``rhs``)."""
    formula = rhs if formula is None else formula
    known = frozenset(map(str, columns))
    tokens = formula_tokens(rhs, formula)
    enclosing: list[str] = []  # "group" or the called function's name, innermost last
    c_names = 0
    for i, tok in enumerate(tokens):
        following = tokens[i + 1].string if i + 1 < len(tokens) else ""
        is_call = tok.type == token.NAME and following == "("
        if tok.type == token.NAME:
            _check_name(tok.string, is_call, known, formula)
            _check_call_content(tok, enclosing, formula, is_call)
            if enclosing and enclosing[-1] == "C":
                c_names += 1
                if c_names > 1:
                    raise _refuse(formula, "C() takes one column name")
        elif tok.type == token.NUMBER:
            if not DECIMAL_NUMBER.match(tok.string):
                raise _refuse(formula, f"the number {tok.string!r} is not a plain decimal")
            _check_call_content(tok, enclosing, formula, False)
        elif tok.type == token.OP:
            _check_operator(tok.string, enclosing, formula)
            if tok.string == "(":
                previous = tokens[i - 1] if i else None
                called = previous is not None and previous.type == token.NAME
                enclosing.append(previous.string if called else "group")
                c_names = 0
            elif tok.string == ")":
                if not enclosing:
                    raise _refuse(formula, "a ')' closes no '('")
                enclosing.pop()
            else:
                _check_call_content(tok, enclosing, formula, False)
        elif tok.type == token.STRING:
            raise _refuse(formula, f"the string {tok.string} is not allowed")
        elif tok.type == token.COMMENT:
            raise _refuse(formula, f"the comment {tok.string!r} is not allowed")
        else:
            raise _refuse(formula, f"the character {tok.string!r} is not allowed")
    if enclosing:
        raise _refuse(formula, "a '(' is never closed")


def _refused_builtin(*_args: object, **_kwargs: object) -> None:
    """Stand-in for every Python builtin in a formula's namespace."""
    raise StopwiseInputError("formulas cannot call Python's builtin functions")


def safe_namespace() -> dict[str, object]:
    """The namespace patsy evaluates formula terms in: ``log`` and ``exp`` (numpy's), and
    every Python builtin name shadowed by a function that refuses to run."""
    namespace: dict[str, object] = {
        name: _refused_builtin for name in dir(builtins) if name not in ALLOWED_FUNCTIONS
    }
    namespace.update(log=np.log, exp=np.exp)
    return namespace
