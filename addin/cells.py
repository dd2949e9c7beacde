"""Cell values in, engine arguments out; results and errors back to cells.

What a published function receives
----------------------------------
A worksheet argument arrives *cell-shaped*, whichever way the function is called:

* a single cell or a literal: a float (spreadsheets have no integers, so 3 arrives
  as 3.0), a str, a bool, a date, or None for an empty cell;
* a range: a list of rows (2-D list), or a 1-D list for one row or one column
  (xlwings' default), or a numpy array (headless recalculation); 1x1 ranges are
  accepted where a single value is expected;
* an error cell: xlwings reads arguments with ``err_to_str=True`` so that Excel's
  error cells arrive as their text ("#N/A", "#DIV/0!", ...); the ``formulas``
  library's error tokens are str subclasses with the same text, and its empty-cell
  token is treated as None.

The helpers here (:func:`number`, :func:`integer`, :func:`text`, :func:`choice`,
:func:`boolean`, :func:`vector`) turn those into engine arguments or raise
:class:`~layerwise.engine.errors.InputError` naming the function's argument.
Empty cells (None, "" or blank text) mean "use the default"; a required argument
left empty is an error. Text never stands in for a number ("5,000,000" typed as
text is refused), except the words "unlimited"/"inf" where a limit may be unbounded.
Trailing empty cells of a range are ignored (so a generous selection works); an
empty cell inside a range is an error.

Error values (the convention)
-----------------------------
A published function never raises. On bad input it *returns* a text error value::

    #VALUE! LW_PREMIUM(limit): must lie in (0, inf], got -5

that is: an error code, a space, the function name with the offending argument in
parentheses, a colon, and the reason. Codes used:

``#VALUE!``  bad input: wrong type, out of range, wrong size, unknown name; also an
             unexpected failure inside the engine (argument shown as ``internal``);
``#REF!``    a model reference that is not (or no longer) in memory; recalculate the
             cell that builds it (see :mod:`layerwise.addin.handles`);
``#NUM!``    a result that is not a finite number (an infinite premium, a ratio
             with a zero denominator);
any code received from another cell (``#N/A``, ``#DIV/0!``, or one of our own
texts) is passed on with its code, so an error shows where it started.

Why text rather than a native error: with xlwings 0.37 on desktop Excel a UDF's
returned str is written as text, and there is no way to return a native error
value *with* a message (a raised exception only shows xlwings' traceback text and
the function server logs it); the headless ``formulas`` path stores the same
text. Text keeps the reason visible in the cell. Excel's ISERROR() does not see
it, but ``=LEFT(A1,1)="#"`` does, and every LW_ function recognises such a text
arriving as an argument (see :func:`parse_error`) and passes it on instead of
treating it as data. Numeric results that are NaN or infinite are never written
as numbers (xlwings would write NaN as an empty cell): scalars become ``#NUM!``
error values, and table entries become "unlimited" (+inf) or "#N/A" (undefined).
"""
from __future__ import annotations

import datetime as _dt
import math
import numbers
import re
from typing import NamedTuple

import numpy as np

from layerwise.engine.errors import InputError, as_float

__all__ = [
    "MISSING", "ERROR_CODES", "CellInputError", "MissingReference", "UpstreamError", "ErrorInfo",
    "error_value", "parse_error", "is_error_value", "is_empty", "single", "number", "integer", "text",
    "choice", "boolean", "vector", "grid", "to_cell", "table_to_cells",
]

MISSING = object()  # "no default": the argument is required

# Excel's error codes, longer ones first so the regular expression tries them first.
ERROR_CODES = (
    "#GETTING_DATA", "#CONNECT!", "#BLOCKED!", "#UNKNOWN!", "#DIV/0!", "#VALUE!", "#SPILL!", "#FIELD!",
    "#NULL!", "#NAME?", "#CALC!", "#BUSY!", "#REF!", "#NUM!", "#N/A",
)
_ERROR_RE = re.compile(
    r"^(?P<code>" + "|".join(re.escape(c) for c in ERROR_CODES) + r")"
    r"(?:\s+(?:(?P<function>[A-Za-z_][A-Za-z0-9_]*)\((?P<argument>[^)]*)\):\s*)?(?P<message>.*))?$",
    re.DOTALL,
)
INF_WORDS = frozenset({"unlimited", "inf", "+inf", "infinity", "infinite"})
_TRUE = frozenset({"true", "yes", "y", "1", "on"})
_FALSE = frozenset({"false", "no", "n", "0", "off"})


# --------------------------------------------------------------------------- errors
class CellInputError(InputError):
    """Bad input reported with a given error code (default ``#VALUE!``)."""

    code = "#VALUE!"


class MissingReference(CellInputError):
    """A data-backed model (or long distortion) reference that is not in memory."""

    code = "#REF!"


class UpstreamError(CellInputError):
    """An argument holds an error value from another cell; passed on with its code."""

    def __init__(self, argument: str, upstream: str, where: str = ""):
        info = parse_error(upstream)
        self.code = info.code if info else "#VALUE!"
        self.upstream = str(upstream)
        super().__init__(argument, f"{where}holds an error from another cell: {upstream}")


class ErrorInfo(NamedTuple):
    code: str
    function: str | None
    argument: str | None
    message: str


def error_value(code: str, function: str, argument: str, message: str) -> str:
    """The text error value, e.g. ``#VALUE! LW_PREMIUM(limit): must lie in (0, inf], got -5``."""
    message = " ".join(str(message).split())  # one line
    return f"{code} {function}({argument}): {message}"


def parse_error(value) -> ErrorInfo | None:
    """ErrorInfo when ``value`` is an error value (ours, or Excel's as text), else None."""
    if not isinstance(value, str):
        return None
    m = _ERROR_RE.match(value.strip())
    if not m:
        return None
    return ErrorInfo(m["code"], m["function"], m["argument"], (m["message"] or "").strip())


def is_error_value(value) -> bool:
    return parse_error(value) is not None


# --------------------------------------------------------------------------- shapes
def _empty_token():
    try:  # the formulas library's empty-cell marker
        import schedula

        return schedula.EMPTY
    except Exception:  # pragma: no cover - schedula comes with formulas
        return None


_EMPTY_TOKEN = _empty_token()


def is_empty(value) -> bool:
    """True for an empty cell: None, "" or blank text, the formulas EMPTY token, or an empty range."""
    if value is None or (_EMPTY_TOKEN is not None and value is _EMPTY_TOKEN):
        return True
    if isinstance(value, str):
        return value.strip() == ""
    if isinstance(value, float) and math.isnan(value):
        return False  # NaN is a bad number, not an empty cell
    if isinstance(value, (list, tuple, np.ndarray)):
        return all(is_empty(v) for v in grid(value)[2])
    return False


def grid(value) -> tuple[int, int, list]:
    """(rows, columns, values in row order) of a cell value or range, in one pass."""
    if isinstance(value, np.ndarray):
        value = value.tolist() if value.ndim else value.item()
    if isinstance(value, (list, tuple)):
        if not value:
            return 0, 0, []
        kinds = set(map(type, value))
        if kinds <= {list, tuple}:
            cols = max(map(len, value))
            flat = [v for row in value for v in row]
            if not set(map(type, flat)).isdisjoint({list, tuple, np.ndarray}):
                flat = _flatten(flat)  # deeper nesting (not cell-shaped, but accepted)
            return len(value), cols, flat
        if kinds.isdisjoint({list, tuple, np.ndarray}):
            return 1, len(value), list(value)
        return len(value), 1, _flatten(value)  # a mix of rows and cells
    return 1, 1, [value]


def _flatten(value) -> list:
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        out = []
        for v in value:
            if isinstance(v, (list, tuple, np.ndarray)):
                out.extend(_flatten(v))
            else:
                out.append(v)
        return out
    return [value]


def _unwrap(v):
    if isinstance(v, np.generic):
        return v.item()
    return v


def single(value, argument: str):
    """The one value of a cell or 1x1 range (None when empty); raises when several cells are given."""
    if isinstance(value, (list, tuple, np.ndarray)):
        r, c, flat = grid(value)
        filled = [v for v in flat if not is_empty(v)]
        if not filled:
            return None
        if len(filled) > 1:
            raise CellInputError(argument, f"expected a single cell, got a range of {r} x {c}")
        value = filled[0]
    value = _unwrap(value)
    if _EMPTY_TOKEN is not None and value is _EMPTY_TOKEN:
        return None
    return value


def _check_error(v, argument: str, where: str = ""):
    if isinstance(v, str) and is_error_value(v):
        raise UpstreamError(argument, str(v), where)


def _describe(v) -> str:
    if isinstance(v, bool):
        return f"the logical value {'TRUE' if v else 'FALSE'}"
    if isinstance(v, str):
        return f"the text {v!r}"
    if isinstance(v, (_dt.date, _dt.datetime, _dt.time)):
        return f"a date/time ({v})"
    return repr(v)


# --------------------------------------------------------------------------- scalars
def _default_for_empty(argument: str, default):
    """The default for an empty cell, or the error that the argument is required."""
    if default is MISSING:
        raise CellInputError(argument, "is required (the cell is empty)")
    return default


def number(
    value,
    argument: str,
    *,
    default=MISSING,
    low: float = -math.inf,
    high: float = math.inf,
    low_open: bool = False,
    high_open: bool = False,
    allow_inf: bool = False,
) -> float:
    """A finite float in the interval (inf allowed, also as the word "unlimited", when ``allow_inf``)."""
    v = single(value, argument)
    if is_empty(v):
        return _default_for_empty(argument, default)
    _check_error(v, argument)
    if isinstance(v, str) and allow_inf and v.strip().lower() in INF_WORDS:
        v = math.inf
    if isinstance(v, bool) or not isinstance(v, (numbers.Real, np.floating, np.integer)):
        hint = " or 'unlimited'" if allow_inf else ""
        raise CellInputError(argument, f"expected a number{hint}, got {_describe(v)}")
    return as_float(v, argument, low=low, high=high, low_open=low_open, high_open=high_open, allow_inf=allow_inf)


def integer(value, argument: str, *, default=MISSING, low: float = -math.inf, high: float = math.inf):
    """A whole number (given as a float, as cells do), returned as int."""
    if is_empty(single(value, argument)):
        return number(None, argument, default=default)
    x = number(value, argument, low=low, high=high)
    if x != math.floor(x):
        raise CellInputError(argument, f"must be a whole number, got {x:.6g}")
    return int(x)


def text(value, argument: str, *, default=MISSING) -> str:
    """Non-empty text, stripped."""
    v = single(value, argument)
    if is_empty(v):
        return _default_for_empty(argument, default)
    _check_error(v, argument)
    if not isinstance(v, str):
        raise CellInputError(argument, f"expected text, got {_describe(v)}")
    return v.strip()


def _key(word: str) -> str:
    return "_".join(word.strip().lower().replace("-", " ").replace("_", " ").split())


def choice(value, argument: str, options: dict[str, str], *, default=MISSING) -> str:
    """One of ``options`` (alias -> canonical value); case, spaces, '-' and '_' ignored."""
    if is_empty(single(value, argument)):
        return text(None, argument, default=default)
    t = text(value, argument)
    k = _key(t)
    if k not in options:
        names = ", ".join(dict.fromkeys(options.values()))
        raise CellInputError(argument, f"unknown value {t!r}; choose one of {names}")
    return options[k]


def boolean(value, argument: str, *, default=MISSING) -> bool:
    """TRUE/FALSE, 1/0, or the words true/false, yes/no."""
    v = single(value, argument)
    if is_empty(v):
        return _default_for_empty(argument, default)
    _check_error(v, argument)
    if isinstance(v, bool):
        return v
    if isinstance(v, (numbers.Real, np.floating, np.integer)) and float(v) in (0.0, 1.0):
        return bool(v)
    if isinstance(v, str) and v.strip().lower() in _TRUE | _FALSE:
        return v.strip().lower() in _TRUE
    raise CellInputError(argument, f"expected TRUE or FALSE, got {_describe(v)}")


# --------------------------------------------------------------------------- ranges
def vector(
    value,
    argument: str,
    *,
    low: float = -math.inf,
    default=MISSING,
    allow_inf_words: bool = False,
    allow_blanks: bool = False,
) -> np.ndarray:
    """A one-row or one-column range (or a single cell) as a 1-D float64 array.

    Trailing empty cells are dropped. With ``allow_blanks`` an empty cell inside
    the range becomes NaN (meaning "not set" for that entry); otherwise it is an
    error naming its position. ``allow_inf_words`` accepts "unlimited" as +inf.
    """
    if isinstance(value, np.ndarray) and value.dtype.kind in "fiu" and value.ndim <= 2:
        r, c = (value.shape + (1, 1))[:2] if value.ndim == 2 else (1, value.size)
        flat = value.astype(np.float64).reshape(-1).tolist()
    else:
        r, c, flat = grid(value)
    if r > 1 and c > 1:
        raise CellInputError(argument, f"expected one row or one column, got {r} rows x {c} columns")
    n = len(flat)
    while n and is_empty(flat[n - 1]):
        n -= 1
    flat = flat[:n]
    if not flat:
        if default is MISSING:
            raise CellInputError(argument, "is empty: give a range of numbers")
        return default
    blank = np.zeros(n, dtype=bool)
    if set(map(type, flat)) <= {float, int}:
        arr = np.array(flat, dtype=np.float64)
    else:
        arr = np.empty(n)
        for i, v in enumerate(flat):
            v = _unwrap(v)
            where = f"cell {i + 1} "
            if is_empty(v):
                if allow_blanks:
                    arr[i] = math.nan
                    blank[i] = True
                    continue
                raise CellInputError(argument, f"{where}is empty")
            _check_error(v, argument, where)
            if isinstance(v, str) and allow_inf_words and v.strip().lower() in INF_WORDS:
                arr[i] = math.inf
                continue
            if isinstance(v, bool) or not isinstance(v, (numbers.Real, np.floating, np.integer)):
                raise CellInputError(argument, f"{where}holds {_describe(v)}, expected a number")
            arr[i] = float(v)
    bad = ~np.isfinite(arr) & ~blank
    if allow_inf_words:
        bad &= ~np.isposinf(arr)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise CellInputError(argument, f"cell {i + 1} is not a finite number ({arr[i]})")
    below = (arr < low) & ~blank
    if below.any():
        i = int(np.flatnonzero(below)[0])
        raise CellInputError(argument, f"cell {i + 1} is {arr[i]:.6g}; values must be >= {low:.6g}")
    return arr


# --------------------------------------------------------------------------- results
def _table_value(v):
    v = _unwrap(v)
    if v is None:
        return ""
    if isinstance(v, bool):
        return v
    if isinstance(v, (numbers.Real,)):
        x = float(v)
        if math.isnan(x):
            return "#N/A"
        if math.isinf(x):
            return "unlimited" if x > 0 else "#NUM! minus infinity"
        return x
    return str(v)


def to_cell(value, function: str, what: str = "result"):
    """A scalar result for one cell: a finite float or text; NaN/inf become #NUM! error values."""
    value = _unwrap(value)
    if isinstance(value, str) or isinstance(value, bool):
        return value
    if isinstance(value, numbers.Real):
        x = float(value)
        if math.isnan(x):
            return error_value("#NUM!", function, what, "is not defined for these inputs")
        if math.isinf(x):
            return error_value("#NUM!", function, what, "is infinite (the layer is unbounded for this model)")
        return x
    return value


def table_to_cells(frame, columns=None) -> list[list]:
    """A DataFrame as a header row plus one row per record, every entry cell-safe."""
    cols = list(frame.columns) if columns is None else list(columns)
    rows = [list(cols)]
    for rec in frame[cols].itertuples(index=False, name=None):
        rows.append([_table_value(v) for v in rec])
    return rows
