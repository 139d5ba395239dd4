"""Model specification and formula safety.

A formula may come from a config file written by somebody else, so it is checked by a
small tokenizer *before* anything evaluates it: only column names, the Wilkinson
operators, numbers and an allow-list of transforms may appear. No attribute access,
subscripts, lambdas, dunder names or unknown calls get through, so nothing the user
writes can run code.
"""
from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from .errors import InputError, option_error

#: Transforms a formula may call. Values are the user-facing description.
ALLOWED_FUNCTIONS: dict[str, str] = {
    "I": "arithmetic of columns, e.g. I(x**2) or I(x - 10)",
    "C": "treat a column as categorical, e.g. C(w) or C(w, Treatment('b'))",
    "Treatment": "reference level of a categorical column inside C()",
    "log": "natural logarithm",
    "log1p": "log(1 + x)",
    "log2": "base-2 logarithm",
    "log10": "base-10 logarithm",
    "exp": "exponential",
    "sqrt": "square root",
    "abs": "absolute value",
    "center": "subtract the sample mean",
    "scale": "subtract the mean and divide by the SD",
}

_TOKEN = re.compile(
    r"""
    (?P<ws>\s+)
  | (?P<quoted>`[^`]+`)
  | (?P<number>(?:\d+\.\d*|\.\d+|\d+)(?:[eE][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<string>'[^'\\]*'|"[^"\\]*")
  | (?P<op>\*\*|[~+\-*/:^(),=])
    """,
    re.VERBOSE,
)


@dataclass(frozen=True)
class Token:
    kind: str
    text: str
    pos: int


def tokenize_formula(formula: str) -> list[Token]:
    """Split a formula into tokens, refusing any character outside the grammar."""
    if not isinstance(formula, str) or not formula.strip():
        raise InputError("The formula is empty; give one like 'y ~ x * w + age'.")
    tokens: list[Token] = []
    pos = 0
    while pos < len(formula):
        m = _TOKEN.match(formula, pos)
        if m is None:
            raise _untokenizable(formula, pos)
        kind = m.lastgroup or ""
        if kind != "ws":
            tokens.append(Token(kind, m.group(), pos))
        pos = m.end()
    return tokens


#: Characters that end a would-be column name in a formula (operators, brackets, quotes, white space).
_NAME_STOP = re.compile(r"[\s~+\-*/:^(),=`'\"\[\]{}<>;|\\]")


def _untokenizable(formula: str, pos: int) -> InputError:
    """The message for a character outside the grammar: a column name with dots, spaces or other
    characters gets the suggestion to back-quote it; anything that looks like code does not."""
    if formula[pos] == "`":
        inside = re.match(r"[^`~+\-*/:^(),=]+", formula[pos + 1 :])
        name = inside.group().strip() if inside and inside.group().strip() else "Solar.R"
        return InputError(
            f"The formula has an unclosed back-quote at character {pos + 1}; close it after the column name, "
            f"e.g. `{name}`."
        )
    start, end = pos, pos
    while start > 0 and not _NAME_STOP.match(formula[start - 1]):
        start -= 1
    while end < len(formula) and not _NAME_STOP.match(formula[end]):
        end += 1
    word = formula[start:end]
    after = formula[end:].lstrip()
    looks_like_name = (
        end > pos and not _NAME_STOP.match(formula[pos]) and re.search(r"[A-Za-z]", word) is not None
        and "__" not in word and not after.startswith("(")
    )
    if looks_like_name:
        return InputError(
            f"The formula contains {word!r} at character {start + 1}, which is not a plain name; a column name "
            f"with dots, spaces or other characters must be written in back-quotes: write it as `{word}`."
        )
    return InputError(
        f"The formula contains {formula[pos : pos + 12]!r} at character {pos + 1}, which is not allowed; "
        "use column names, numbers, the operators ~ + - * : / ** ( ) and the "
        f"transforms {', '.join(sorted(ALLOWED_FUNCTIONS))}."
    )


def column_calls(formula: str) -> tuple[tuple[str, str], ...]:
    """(transform, column) for every call whose first argument is a bare column, e.g. ``log(cigs)`` →
    ("log", "cigs") and ``C(w, Treatment('a'))`` → ("C", "w"); calls on expressions are left out."""
    tokens = tokenize_formula(formula)
    out: list[tuple[str, str]] = []
    for i in range(len(tokens) - 3):
        fn, open_, arg, close = tokens[i : i + 4]
        if (fn.kind == "name" and fn.text in ALLOWED_FUNCTIONS and open_.text == "("
                and arg.kind in ("name", "quoted") and close.text in (")", ",")):
            pair = (fn.text, arg.text[1:-1] if arg.kind == "quoted" else arg.text)
            if pair not in out:
                out.append(pair)
    return tuple(out)


def check_formula(formula: str) -> tuple[str, list[str]]:
    """Validate a formula's grammar and return (response, variable names it uses).

    Raises InputError naming the offending piece. Column existence is checked later,
    against the data.
    """
    tokens = tokenize_formula(formula)
    tildes = [t for t in tokens if t.text == "~"]
    if len(tildes) != 1:
        raise InputError(
            f"The formula {formula!r} must contain exactly one '~' separating the outcome "
            "from the predictors, e.g. 'y ~ x * w'."
        )
    variables: list[str] = []
    stack: list[str] = []  # the names of the calls we are inside ("(" for grouping)
    prev: Token | None = None
    for i, tok in enumerate(tokens):
        nxt = tokens[i + 1] if i + 1 < len(tokens) else None
        if tok.kind == "name":
            _check_name(tok, nxt, variables)
        elif tok.kind == "quoted":
            name = tok.text[1:-1]
            if name not in variables:
                variables.append(name)
        else:
            _check_symbol(tok, prev, stack)
        prev = tok
    if stack:
        raise InputError(f"The formula {formula!r} has an unclosed '('.")
    return _response(formula, tokens, tildes[0]), variables


def _check_name(tok: Token, nxt: Token | None, variables: list[str]) -> None:
    """A name token of a formula: an allowed transform when called, never a keyword argument,
    else a column, added to ``variables`` once."""
    if tok.text.startswith("__"):
        raise InputError(f"The formula contains {tok.text!r}; dunder names are not allowed.")
    if nxt is not None and nxt.text == "(":
        if tok.text not in ALLOWED_FUNCTIONS:
            raise InputError(
                f"The formula calls {tok.text}(), which is not an allowed transform; "
                f"allowed: {', '.join(sorted(ALLOWED_FUNCTIONS))}."
            )
    elif nxt is not None and nxt.text == "=":
        raise InputError(
            f"The formula uses a keyword argument {tok.text}=; write C(w, Treatment('level')) "
            "to choose a reference level."
        )
    elif tok.text not in variables:
        # A bare name is a column, even one spelled like a transform (a column called 'C').
        variables.append(tok.text)


def _check_symbol(tok: Token, prev: Token | None, stack: list[str]) -> None:
    """A quoted text or punctuation token of a formula, against the calls it stands inside
    (``stack``, updated here for parentheses)."""
    if tok.kind == "string":
        inside = [s for s in stack if s != "("]
        if not inside or inside[-1] != "Treatment":
            raise InputError(
                f"The formula contains the text {tok.text}; quoted text is only allowed as the "
                "reference level in C(w, Treatment('level'))."
            )
    elif tok.text == "(":
        stack.append(prev.text if prev is not None and prev.kind == "name" else "(")
    elif tok.text == ")":
        if not stack:
            raise InputError(f"The formula has an unmatched ')' at character {tok.pos + 1}.")
        stack.pop()
    elif tok.text == ",":
        if not stack or stack[-1] not in ("C", "Treatment"):
            raise InputError(
                f"The formula has a ',' at character {tok.pos + 1}; commas are only allowed "
                "inside C(w, Treatment('level'))."
            )
    elif tok.text == "=":
        raise InputError(f"The formula has an '=' at character {tok.pos + 1}; it is not allowed.")
    elif tok.text == "~" and stack:
        raise InputError("The '~' of the formula must not stand inside parentheses.")


def _response(formula: str, tokens: list[Token], tilde: Token) -> str:
    """The one column the outcome side of the formula names."""
    lhs = [t for t in tokens[: tokens.index(tilde)]]
    rhs = tokens[tokens.index(tilde) + 1 :]
    if not lhs:
        raise InputError(f"The formula {formula!r} has no outcome before '~'.")
    if not rhs:
        raise InputError(f"The formula {formula!r} has no predictors after '~'.")
    response_names = [t.text[1:-1] if t.kind == "quoted" else t.text for t in lhs
                      if t.kind in ("name", "quoted") and t.text not in ALLOWED_FUNCTIONS]
    if len(response_names) != 1:
        raise InputError(
            f"The outcome side of {formula!r} must name exactly one column (a transform such as log(y) is fine)."
        )
    return response_names[0]


ProbeValues = Sequence[float] | str | None


@dataclass(frozen=True)
class ModelSpec:
    """Everything that defines one moderation analysis, before data are seen.

    Parameters
    ----------
    formula : str
        Wilkinson formula, e.g. ``"y ~ x * w + age"``.
    focal : str
        Column whose slope is probed.
    moderators : tuple of str
        One or two moderator columns (two give a three-way term).
    probe : mapping of moderator to values or a rule, default "sd"
        ``"sd"`` (mean − 1 SD, mean, mean + 1 SD; Aiken & West 1991), ``"percentiles"``
        (10th, 25th, 50th, 75th, 90th) or ``"percentiles:5,50,95"``, or an explicit list
        of values on the user's scale. Categorical moderators are probed at every level.
    alpha : float, default=0.05
    seed : int, default=20240917
    center : bool, default=False
        Mean-centre the focal predictor and the moderators before fitting. Conditional
        effects and region boundaries are always reported on the user's raw scale;
        coefficients on the centred scale.
    cluster : str, optional
        Column of cluster ids (teams, classes, persons measured repeatedly); rows that share
        an id are not independent. Used by the cluster-robust back-ends and the wild bootstrap.

    Notes
    -----
    The formula is checked by :func:`check_formula` when the spec is made: only column names,
    numbers, the operators ~ + - * : / ** ( ) and the transforms of :data:`ALLOWED_FUNCTIONS`
    pass, so nothing the user writes is ever evaluated as code.
    """

    formula: str
    focal: str
    moderators: tuple[str, ...]
    probe: Mapping[str, Any] = field(default_factory=dict)
    alpha: float = 0.05
    seed: int = 20240917
    center: bool = False
    cluster: str | None = None

    def __post_init__(self) -> None:
        if isinstance(self.moderators, str):
            object.__setattr__(self, "moderators", (self.moderators,))
        object.__setattr__(self, "moderators", tuple(self.moderators))
        if not isinstance(self.focal, str) or not self.focal:
            raise option_error("focal", "the name of a column", self.focal)
        if not 1 <= len(self.moderators) <= 2:
            raise option_error("moderator", "one or two column names", list(self.moderators))
        if self.focal in self.moderators:
            raise InputError(
                f"The focal predictor {self.focal!r} is also given as a moderator; "
                "choose a different column for one of them."
            )
        if len(set(self.moderators)) != len(self.moderators):
            raise InputError(f"The moderators {list(self.moderators)} repeat a column; give two different ones.")
        alpha = self.alpha
        if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not math.isfinite(alpha) or not 0 < alpha < 1:
            raise option_error("alpha", "a number in (0, 1)", alpha)
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise option_error("seed", "a non-negative whole number", self.seed)
        if self.cluster is not None and (not isinstance(self.cluster, str) or not self.cluster.strip()):
            raise option_error("cluster", "the name of the column of cluster ids", self.cluster)
        probe = self.probe
        if probe is None or isinstance(probe, str) or (isinstance(probe, Sequence) and not isinstance(probe, Mapping)):
            probe = {self.moderators[0]: probe} if probe is not None else {}
        probe = dict(probe)
        for key, rule in probe.items():
            if key not in self.moderators:
                raise InputError(
                    f"Probe values are given for {key!r}, which is not a moderator; moderators: {list(self.moderators)}."
                )
            parse_probe_rule(rule, key)
        object.__setattr__(self, "probe", probe)
        response, variables = check_formula(self.formula)
        object.__setattr__(self, "_response", response)
        object.__setattr__(self, "_variables", tuple(variables))
        object.__setattr__(self, "_column_calls", column_calls(self.formula))
        if self.cluster is not None and self.cluster in (response, self.focal):
            raise InputError(f"The cluster column {self.cluster!r} is also the outcome or the focal predictor; "
                             "name the column that holds the cluster ids.")

    @property
    def response(self) -> str:
        """The column named on the outcome side."""
        return self._response  # type: ignore[attr-defined]

    @property
    def variables(self) -> tuple[str, ...]:
        """Every column name the formula mentions, outcome first."""
        return self._variables  # type: ignore[attr-defined]

    @property
    def column_calls(self) -> tuple[tuple[str, str], ...]:
        """(transform, column) pairs of the formula's calls on bare columns; see :func:`column_calls`."""
        return self._column_calls  # type: ignore[attr-defined]


def parse_probe_rule(rule: Any, moderator: str) -> tuple[str, tuple[float, ...]]:
    """Normalise a probe rule to ("sd", ()), ("percentiles", (q...)) or ("values", (v...))."""
    if rule is None or rule == "sd":
        return "sd", ()
    if isinstance(rule, str):
        text = rule.strip().lower()
        if text.startswith("percentiles"):
            rest = text[len("percentiles") :].lstrip(":").strip()
            qs = (10.0, 25.0, 50.0, 75.0, 90.0) if not rest else _numbers(rest, moderator)
            if any(not 0 <= q <= 100 for q in qs):
                raise option_error(f"probe for {moderator}", "percentiles between 0 and 100", rule)
            return "percentiles", tuple(qs)
        return "values", _numbers(text, moderator)
    if isinstance(rule, (int, float)) and not isinstance(rule, bool):
        rule = [rule]
    if isinstance(rule, Sequence):
        try:
            values = tuple(float(v) for v in rule)
        except (TypeError, ValueError):
            # Level labels of a categorical moderator are kept as text.
            return "levels", tuple(rule)
        if not values or not all(math.isfinite(v) for v in values):
            raise option_error(f"probe for {moderator}", "a non-empty list of finite numbers", list(rule))
        return "values", values
    raise option_error(f"probe for {moderator}", "'sd', 'percentiles', 'percentiles:10,50,90' or a list of values", rule)


def _numbers(text: str, moderator: str) -> tuple[float, ...]:
    try:
        values = tuple(float(v) for v in text.replace(";", ",").split(",") if v.strip())
    except ValueError:
        raise option_error(f"probe for {moderator}", "comma-separated numbers such as '1,2.5,4'", text) from None
    if not values or not all(math.isfinite(v) for v in values):
        raise option_error(f"probe for {moderator}", "comma-separated finite numbers", text)
    return values
