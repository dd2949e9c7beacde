"""Headless recalculation of workbooks that call custom worksheet functions.

:func:`recalculate` opens an .xlsx (or .xlsm), evaluates every formula with the
``formulas`` library after registering the given custom functions, and writes a
priced copy that keeps every formula and stores each computed value as the
cell's cached value, so the copy shows numbers in programs that do not
recalculate. This module knows nothing about pricing: callers pass a mapping of
function names to Python callables.

Conventions for custom functions
--------------------------------
Names are valid VBA identifiers (a letter, then letters, digits or
underscores); they are matched case-insensitively and may not shadow an Excel
function that ``formulas`` implements. A name is also registered with Excel's
``_xludf.`` prefix.

Arguments arrive as plain Python values:

* numbers as ``float``, text as ``str``, logicals as ``bool``, empty cells as
  ``None``;
* a reference to one cell, or any 1x1 result, as that scalar;
* a range or array as a 2-D list of rows of such scalars (a 1-D array, such as
  a union of ranges, arrives as a single row);
* an omitted argument (``F(A1,,3)``) arrives as ``None``, like an empty
  cell, as xlwings passes it in Excel (``formulas`` compiles it to 0, which
  would silently mean 0 where the function's default was meant, e.g. zero
  reinstatements instead of unlimited); Excel's own functions still see 0;
* errors: if any argument is or contains an error value the function is not
  called and the first error is the result, as with most Excel functions. A
  callable with a true attribute ``accepts_errors`` is called anyway and sees
  errors as :class:`CellError` objects.

Results are converted back:

* ``float``/``int``/numpy numbers become numbers (NaN and infinities become
  ``#NUM!``), ``bool`` a logical, ``str`` text, ``None`` empty text ``""``;
* a string that is exactly an Excel error code (see :data:`ERROR_CODES`), or a
  :class:`CellError`, becomes that error; the ``CellError`` message is kept in
  :attr:`Recalculation.errors`;
* a 2-D list/tuple or numpy array fills an array formula's range (entered with
  openpyxl's ``ArrayFormula``): as in Excel, a result too large is cropped, a
  single row or column is repeated, and missing cells show ``#N/A``. A 1-D
  result is one row. In an ordinary one-cell formula a multi-cell result shows
  its top-left value, as in Excel before dynamic arrays;
* any other type, or an exception raised by the function, stops the run with a
  :class:`RecalcError` naming the cell and the function; nothing is written.

Functions are called once per formula evaluation, in dependency order, on one
thread. ``formulas`` may call a function whose arguments are all literals
(``=F(2, 3)``) while loading the workbook rather than while calculating.

What other programs show
------------------------
Excel and openpyxl (``data_only=True``) read every cached value. LibreOffice
(checked with 7.4, which by default does not recalculate xlsx files on load)
shows the cached numbers and texts of ordinary formula cells, but recomputes
array formulas and formula cells whose cached value is a logical, an error or
empty text; where those use custom functions it shows ``#NAME?``.

Limits of ``formulas`` worked around or refused here
----------------------------------------------------
* Loading costs about 1.5-2 ms per formula (parsing and building a small
  dispatcher for each), calculating about 0.5 ms: 1,000 formula cells take
  2-3 seconds. The cycle search is skipped unless the graph has a cycle.
* Sheet names containing an apostrophe cannot be evaluated; such workbooks are
  refused with a :class:`RecalcError` rather than priced with ``#REF!``.
* Cells of an array range that hold cached errors (as Excel and LibreOffice
  save them) would be compiled as formulas of their own; they are ignored.
* Circular references give ``#VALUE!`` with the message "circular reference";
  no iterative calculation.
"""
from __future__ import annotations

import math
import numbers
import os
import re
import threading
import time
import types
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, NamedTuple

import numpy as np
import schedula as sh
import tqdm as _tqdm
from openpyxl.utils.cell import (
    column_index_from_string,
    get_column_letter,
    range_boundaries,
)

import formulas
import formulas.excel as _fx
from formulas.cell import CellWrapper, InvRangesAssembler, Ref
from formulas.errors import InvalidRangeName
from formulas.functions import Array, wrap_ranges_func
from formulas.ranges import Ranges
from formulas.tokens.operand import Empty, Error, XlError

from .xlsx_values import atomic_output, write_values

__all__ = [
    "ERROR_CODES",
    "CellError",
    "RecalcError",
    "SourceNotFoundError",
    "Recalculation",
    "TraceRow",
    "recalculate",
    "format_trace",
]

#: Error codes a cell can hold (the set an xlsx file can store with t="e").
ERROR_CODES: tuple[str, ...] = tuple(Error.errors)

_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_COORD_RE = re.compile(r"^\$?([A-Za-z]{1,3})\$?([0-9]+)$")
_CALL_RE = re.compile(r"([A-Za-z_][A-Za-z0-9_.]*)\s*\(")
_SUFFIXES = (".xlsx", ".xlsm")
# Excel functions formulas implements, taken before anything is registered.
_BUILTINS = frozenset(formulas.get_functions())
# get_functions() is one process-wide dict: registration and model building
# must not interleave between threads.
_REGISTRY_LOCK = threading.Lock()


class RecalcError(ValueError):
    """A workbook could not be recalculated; the message names the cell or argument."""


class SourceNotFoundError(RecalcError, FileNotFoundError):
    """The source workbook does not exist."""


@dataclass(frozen=True)
class CellError:
    """An Excel error value, optionally with a message saying why.

    Custom functions may return one; :attr:`Recalculation.values` and
    :attr:`Recalculation.errors` hold one for every cell showing an error.
    ``str()`` gives the code.
    """

    code: str = "#VALUE!"
    message: str = ""

    def __post_init__(self):
        if self.code not in ERROR_CODES:
            raise ValueError(f"unknown Excel error code {self.code!r}; use one of {', '.join(ERROR_CODES)}")

    def __str__(self):
        return self.code


class TraceRow(NamedTuple):
    """One line of a trace: how deep it sits, what it is and what it holds.

    ``cell`` is "Sheet!A1", a range "Sheet!A1:B3", or a defined name;
    ``formula`` is the formula text or None for inputs; ``value`` is a scalar
    or, for ranges, a 2-D list; ``note`` says "see above" for a precedent
    already listed, or describes ranges, array formulas and names.
    """

    depth: int
    cell: str
    formula: str | None
    value: Any
    note: str = ""


# ---------------------------------------------------------------- conversions

def _is_number(x) -> bool:
    return isinstance(x, numbers.Real) and not isinstance(x, (bool, np.bool_))


def _error_from_xl(err) -> CellError:
    code = str(err)
    if code in ERROR_CODES:
        return CellError(code)
    # formulas marks unresolved circular references with its own token.
    return CellError("#VALUE!", "circular reference")


class _Omitted(float):
    """An omitted argument: 0 to Excel's own functions, None to custom ones."""

    __slots__ = ()

    def __repr__(self):
        return "<omitted>"


_OMITTED = _Omitted(0.0)


def _plain_scalar(v):
    """A value from formulas as a plain Python scalar."""
    if v is sh.EMPTY or v is None or isinstance(v, _Omitted):
        return None
    if isinstance(v, XlError):
        return _error_from_xl(v)
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if _is_number(v):
        return float(v)
    if isinstance(v, np.ndarray):
        return _plain_scalar(v.item()) if v.size == 1 else v.tolist()
    if isinstance(v, str):
        return str(v)
    return v


def _plain_arg(a):
    """A function argument as a scalar or a 2-D list of scalars."""
    if isinstance(a, Ranges):
        a = a.value
    if isinstance(a, np.ndarray):
        if a.size == 1:
            return _plain_scalar(a.reshape(-1)[0])
        if a.ndim == 1:
            a = a.reshape(1, -1)
        elif a.ndim != 2:
            a = a.reshape(a.shape[0], -1)
        return [[_plain_scalar(x) for x in row] for row in a]
    return _plain_scalar(a)


def _first_error(args):
    for a in args:
        if isinstance(a, CellError):
            return a
        if isinstance(a, list):
            for row in a:
                for x in row:
                    if isinstance(x, CellError):
                        return x
    return None


class _ReturnTypeError(TypeError):
    pass


def _result_scalar(v, notes: list):
    if v is None:
        return ""
    if isinstance(v, CellError):
        if v.message:
            notes.append(v.message)
        return Error.errors[v.code]
    if isinstance(v, XlError):
        return v
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if _is_number(v):
        x = float(v)
        return x if math.isfinite(x) else Error.errors["#NUM!"]
    if isinstance(v, str):
        return Error.errors[v] if v in ERROR_CODES else str(v)
    raise _ReturnTypeError(f"returned a {type(v).__name__} ({v!r:.60}); expected a number, text, bool, None, CellError or a 2-D list of them")


def _result(v, notes: list):
    if isinstance(v, (list, tuple, np.ndarray)):
        try:
            arr = np.array(v, dtype=object)
        except ValueError as exc:
            raise _ReturnTypeError(f"returned a ragged array: {exc}") from None
        if arr.ndim == 0:
            return _result_scalar(arr.item(), notes)
        if arr.ndim == 1:
            arr = arr.reshape(1, -1)
        if arr.ndim != 2 or arr.size == 0:
            raise _ReturnTypeError(f"returned an array of shape {arr.shape}; expected 2-D")
        out = np.empty(arr.shape, dtype=object)
        for idx, x in np.ndenumerate(arr):
            out[idx] = _result_scalar(x, notes)
        return out.view(Array)
    return _result_scalar(v, notes)


def _fit(value, shape):
    """Fit a 2-D result to an array formula's range the way Excel does."""
    rows, cols = shape
    r, c = value.shape
    out = np.empty(shape, dtype=object)
    out[:, :] = Error.errors["#N/A"]
    src = value
    if r == 1:
        src = np.repeat(src, rows, axis=0)
    if c == 1:
        src = np.repeat(src, cols, axis=1)
    rr, cc = min(rows, src.shape[0]), min(cols, src.shape[1])
    out[:rr, :cc] = src[:rr, :cc]
    return out.view(Array)


# ---------------------------------------------------------------- run state

class _CustomFunctionFailed(Exception):
    def __init__(self, name, exc):
        super().__init__(name, exc)
        self.name, self.exc = name, exc


class _Run:
    """What the adapters and cell wrappers share during one recalculation."""

    def __init__(self):
        self.current: str | None = None  # formulas key of the cell being compiled or evaluated
        self.failure: tuple[str, BaseException] | None = None
        self.notes: dict[str, list[str]] = {}

    def note(self, messages):
        if messages and self.current is not None:
            self.notes.setdefault(self.current, []).extend(messages)

    def fail(self, exc):
        if self.failure is None:
            self.failure = (self.current, exc)


def _adapt(name: str, func: Callable, run: _Run):
    accepts_errors = bool(getattr(func, "accepts_errors", False))

    def call(*args):
        plain = [_plain_arg(a) for a in args]
        if not accepts_errors:
            err = _first_error(plain)
            if err is not None:
                return Error.errors[err.code]
        try:
            out = func(*plain)
        except Exception as exc:
            raise _CustomFunctionFailed(name, exc) from exc
        notes: list[str] = []
        try:
            res = _result(out, notes)
        except _ReturnTypeError as exc:
            raise _CustomFunctionFailed(name, exc) from None
        run.note(notes)
        return res

    call.__name__ = name
    # wrap_ranges_func turns references into arrays and, while formulas is
    # compiling, defers calls whose arguments are not known yet.
    return wrap_ranges_func(call)


class _Model(_fx.ExcelModel):
    """ExcelModel that records which cell it is compiling, for error messages."""

    def __init__(self, run: _Run):
        super().__init__()
        self._run = run
        self._covered: dict[int, set] = {}

    def _in_array_block(self, cell, formula_references) -> bool:
        """Whether ``cell`` is a non-anchor cell of an array formula range."""
        covered = self._covered.get(id(formula_references))
        if covered is None:
            covered = set()
            for anchor, ref in formula_references.items():
                area = _parse_area(ref)
                if area:
                    r1, c1, r2, c2 = area
                    covered.update((r, c) for r in range(r1, r2 + 1) for c in range(c1, c2 + 1))
                    covered.discard(tuple(reversed(range_boundaries(anchor)[:2])))
            self._covered[id(formula_references)] = covered
        return (getattr(cell, "row", None), getattr(cell, "column", None)) in covered

    def compile_cell(self, cell, context, references, formula_references):
        crd = formula_references.get(cell.coordinate, cell.coordinate)
        self._run.current = f"'[{context.get('filename', '')}]{context.get('sheet', '')}'!{crd}"
        if cell.data_type == "e" and self._in_array_block(cell, formula_references):
            # Files saved by Excel or LibreOffice cache the array's values in its other
            # cells; formulas would compile a cached error (#N/A) as a formula of its
            # own and let it replace the array's result, so treat the cell as empty.
            return self._compile_cell(cell.coordinate, None, context, False, references)
        try:
            return super().compile_cell(cell, context, references, formula_references)
        except Exception as exc:
            self._run.fail(exc)
            raise


def _has_cycle(dsp) -> bool:
    """Whether the dependency graph has a cycle, ignoring formulas' range-to-cell back edges."""
    nodes = dsp.nodes
    skip = {k for k, n in dsp.function_nodes.items() if isinstance(n.get("function"), InvRangesAssembler)}
    succ = dsp.dmap.succ
    state: dict = {}  # 1 = on the current path, 2 = finished
    for start in succ:
        if start in state or start in skip:
            continue
        state[start] = 1
        stack = [(start, iter(succ[start]))]
        while stack:
            node, it = stack[-1]
            for nxt in it:
                if nxt in skip or nxt not in nodes:
                    continue
                s = state.get(nxt)
                if s == 1:
                    return True
                if s is None:
                    state[nxt] = 1
                    stack.append((nxt, iter(succ[nxt])))
                    break
            else:
                state[node] = 2
                stack.pop()
    return False


class _QuietTqdm(types.SimpleNamespace):
    pass


def _quiet_tqdm():
    # ExcelModel.complete() draws a progress bar on stderr; silence it.
    return _QuietTqdm(tqdm=lambda *a, **k: _tqdm.tqdm(*a, **{**k, "disable": True}))


def _track(fn, key: str, shape, run: _Run):
    """Wrap one cell's compiled formula so failures and notes know their cell."""

    def cell_function(*args):
        run.current = key
        try:
            res = fn(*args)
        except BaseException as exc:
            run.fail(exc)
            raise
        if isinstance(res, np.ndarray) and not isinstance(res, Ranges) and res.ndim == 2:
            if shape == (1, 1):
                if res.size > 1:
                    r, c = res.shape
                    run.note([f"the formula gives a {r}x{c} array; enter it as an array formula over a {r}x{c} range"])
            elif res.shape != shape:
                res = _fit(res, shape)
        return res

    cell_function.__name__ = getattr(fn, "__name__", key)
    return cell_function


# ---------------------------------------------------------------- names

def _cell_name(sheet: str, row: int, col: int) -> str:
    return f"{sheet}!{get_column_letter(col)}{row}"


def _range_name(sheet, r1, c1, r2, c2) -> str:
    if (r1, c1) == (r2, c2):
        return _cell_name(sheet, r1, c1)
    return f"{sheet}!{get_column_letter(c1)}{r1}:{get_column_letter(c2)}{r2}"


def _split_ref(ref: str):
    """'Sheet!A1' -> ('Sheet', 'A1'); 'A1' -> (None, 'A1'); quotes are removed."""
    ref = ref.strip()
    if "!" in ref:
        sheet, addr = ref.rsplit("!", 1)
        if len(sheet) >= 2 and sheet[0] == sheet[-1] == "'":
            sheet = sheet[1:-1].replace("''", "'")
        return sheet, addr.strip()
    return None, ref


def _parse_area(addr: str):
    """'A1' or 'A1:B3' (with or without $) -> (r1, c1, r2, c2), or None."""
    parts = addr.replace("$", "").upper().split(":")
    if len(parts) not in (1, 2) or not all(_COORD_RE.match(p) for p in parts):
        return None
    c1, r1, c2, r2 = range_boundaries(":".join(parts))
    return r1, c1, r2, c2


# ---------------------------------------------------------------- result

@dataclass(frozen=True)
class Recalculation:
    """What a recalculation produced.

    ``values`` maps "Sheet!A1" to the computed value of every formula cell
    (each cell of an array formula range included); ``errors`` maps the cells
    whose value is an error to a :class:`CellError` with the reason when one is
    known; ``target`` is the priced copy; ``timings`` holds seconds spent
    loading, calculating and writing.
    """

    values: Mapping[str, Any]
    errors: Mapping[str, CellError]
    target: Path
    source: Path
    timings: Mapping[str, float]
    _formulas: Mapping[str, str] = field(repr=False)
    _blocks: Mapping[str, str] = field(repr=False)
    _block_shapes: Mapping[str, tuple] = field(repr=False)
    _precedents: Mapping[str, tuple] = field(repr=False)
    _constants: Mapping[str, Any] = field(repr=False)
    _names: Mapping[str, tuple] = field(repr=False)  # defined name -> (formula, value)
    _sheets: tuple = field(repr=False)  # ((name, max_row, max_col), ...)

    # -- lookups
    def _sheet(self, name: str | None) -> str:
        if name is None:
            return self._sheets[0][0]
        for s, _, _ in self._sheets:
            if s.upper() == name.upper():
                return s
        raise RecalcError(f"no sheet named {name!r}; sheets are {', '.join(s for s, _, _ in self._sheets)}")

    def _value(self, name: str):
        if name in self.values:
            return self.values[name]
        return self._constants.get(name)

    def _resolve(self, ref: str) -> str:
        key = ref.strip()
        if key.upper() in self._names:
            return key.upper()
        sheet, addr = _split_ref(key)
        area = _parse_area(addr)
        if area is None:
            raise RecalcError(f"cannot trace {ref!r}: not a cell, range or defined name")
        return _range_name(self._sheet(sheet), *area)

    def _area_cells(self, name: str):
        sheet, addr = _split_ref(name)
        r1, c1, r2, c2 = _parse_area(addr)
        for s, max_row, max_col in self._sheets:
            if s == sheet:
                # Whole-column references would list a million cells; stop at the used area.
                r2, c2 = min(r2, max(max_row, r1)), min(c2, max(max_col, c1))
        return sheet, r1, c1, r2, c2

    def _range_value(self, name):
        sheet, r1, c1, r2, c2 = self._area_cells(name)
        return [[self._value(_cell_name(sheet, r, c)) for c in range(c1, c2 + 1)] for r in range(r1, r2 + 1)]

    # -- trace
    def trace(self, cell: str) -> list[TraceRow]:
        """The formulas and inputs feeding ``cell``, depth first, down to constants.

        ``cell`` is "Sheet!A1", "A1" (first sheet), a range or a defined name.
        Each precedent is expanded once; later mentions say "see above". A
        range is one row holding its 2-D values, followed by the formula cells
        inside it.
        """
        rows: list[TraceRow] = []
        seen: set[str] = set()
        self._visit(self._resolve(cell), 0, rows, seen)
        return rows

    def _visit(self, node: str, depth: int, rows, seen):
        if node in self._names:
            formula, value = self._names[node]
            if node in seen:
                rows.append(TraceRow(depth, node, formula, value, "see above"))
                return
            seen.add(node)
            rows.append(TraceRow(depth, node, formula, value, "defined name"))
            for p in self._precedents.get(node, ()):
                self._visit(p, depth + 1, rows, seen)
            return
        if ":" in node and node not in self._block_shapes:
            if node in seen:
                rows.append(TraceRow(depth, node, None, self._range_value(node), "see above"))
                return
            seen.add(node)
            sheet, r1, c1, r2, c2 = self._area_cells(node)
            rows.append(TraceRow(depth, node, None, self._range_value(node), f"range {r2 - r1 + 1}x{c2 - c1 + 1}"))
            listed = set()
            for r in range(r1, r2 + 1):
                for c in range(c1, c2 + 1):
                    name = _cell_name(sheet, r, c)
                    target = self._blocks.get(name, name)
                    if name in self._formulas and target not in listed:
                        listed.add(target)
                        self._visit(target, depth + 1, rows, seen)
            return
        if node in self._block_shapes:  # a whole array formula range
            formula, value = self._formulas[node], self._range_value(node)
            if node in seen:
                rows.append(TraceRow(depth, node, formula, value, "see above"))
                return
            seen.add(node)
            rows.append(TraceRow(depth, node, formula, value, "array formula"))
            for p in self._precedents.get(node, ()):
                self._visit(p, depth + 1, rows, seen)
            return
        block = self._blocks.get(node)
        key = block or node
        formula = self._formulas.get(node)
        value = self._value(node)
        if key in seen:
            note = f"part of array formula {block}; see above" if block else "see above"
            rows.append(TraceRow(depth, node, formula, value, note))
            return
        seen.add(key)
        if formula is None:
            note = "" if node in self._constants else "empty"
            if node.startswith("#") or "[" in node:
                note = "reference outside this workbook"
            rows.append(TraceRow(depth, node, None, value, note))
            return
        rows.append(TraceRow(depth, node, formula, value, f"part of array formula {block}" if block else ""))
        for p in self._precedents.get(key, ()):
            self._visit(p, depth + 1, rows, seen)

    def format_trace(self, cell: str) -> str:
        """Shorthand for ``format_trace(self.trace(cell))``."""
        return format_trace(self.trace(cell))


def _fmt_scalar(v) -> str:
    if v is None:
        return "(empty)"
    if isinstance(v, bool):
        return "TRUE" if v else "FALSE"
    if isinstance(v, float):
        return f"{v:.10g}"
    if isinstance(v, CellError):
        return f"{v.code} ({v.message})" if v.message else v.code
    if isinstance(v, str):
        return '"' + (v if len(v) <= 40 else v[:37] + "...") + '"'
    return repr(v)


def _fmt_value(v, limit: int = 6) -> str:
    if isinstance(v, list):
        flat = [x for row in v for x in row]
        shown = ", ".join(_fmt_scalar(x) for x in flat[:limit])
        more = f", ... +{len(flat) - limit} more" if len(flat) > limit else ""
        return f"[{shown}{more}] ({len(v)}x{len(v[0]) if v else 0})"
    return _fmt_scalar(v)


def format_trace(rows) -> str:
    """Render trace rows as an indented text tree, one line per row."""
    lines = []
    for row in rows:
        depth, cell, formula, value, note = (tuple(row) + ("",))[:5]
        text = "  " * depth + cell
        if formula:
            text += f"  {formula}"
        text += f"  -> {_fmt_value(value)}"
        if note:
            text += f"  [{note}]"
        lines.append(text)
    return "\n".join(lines)


# ---------------------------------------------------------------- recalculate

def _check_paths(source, target):
    src = Path(source)
    if not src.exists():
        raise SourceNotFoundError(f"source workbook not found: {src}")
    if not src.is_file():
        raise RecalcError(f"source is not a file: {src}")
    if src.suffix.lower() not in _SUFFIXES:
        raise RecalcError(f"source must be an .xlsx or .xlsm workbook: {src}")
    if not zipfile.is_zipfile(src):
        raise RecalcError(f"source is not an xlsx workbook (not a zip file): {src}")
    with zipfile.ZipFile(src) as z:
        if "[Content_Types].xml" not in z.namelist():
            raise RecalcError(f"source is not an xlsx workbook (no [Content_Types].xml): {src}")
    tgt = Path(target) if target is not None else src.with_name(f"{src.stem}.priced{src.suffix}")
    if tgt.suffix.lower() != src.suffix.lower():
        raise RecalcError(f"target {tgt} must have the source's extension {src.suffix}")
    if not tgt.parent.is_dir():
        raise RecalcError(f"target folder does not exist: {tgt.parent}")
    if tgt.resolve() == src.resolve() or (tgt.exists() and os.path.samefile(tgt, src)):
        raise RecalcError(f"target {tgt} is the source workbook; it is never overwritten")
    return src, tgt


def _check_functions(functions) -> dict[str, Callable]:
    if not isinstance(functions, Mapping):
        raise RecalcError("functions must be a mapping of worksheet function names to callables")
    out = {}
    for name, fn in functions.items():
        if not isinstance(name, str) or not _NAME_RE.match(name):
            raise RecalcError(f"custom function name {name!r} is not a valid VBA identifier")
        if not callable(fn):
            raise RecalcError(f"custom function {name!r} is not callable")
        upper = name.upper()
        if upper in _BUILTINS:
            raise RecalcError(f"custom function {name!r} would shadow Excel's built-in {upper}")
        if upper in out:
            raise RecalcError(f"custom function {name!r} is given twice")
        out[upper] = fn
    return out


def _override_value(ref, v):
    if v is None or isinstance(v, (bool, str)):
        return v
    if isinstance(v, np.bool_):
        return bool(v)
    if _is_number(v):
        x = float(v)
        if not math.isfinite(x):
            raise RecalcError(f"override {ref!r}: {v!r} is not a finite number")
        return x
    raise RecalcError(f"override {ref!r}: {type(v).__name__} values are not supported (use a number, text, bool or None)")


def _apply_overrides(book, overrides) -> dict[str, dict]:
    """Write what-if values into the loaded book; return them by sheet for the xlsx writer."""
    written: dict[str, dict] = {}
    for ref, raw in (overrides or {}).items():
        if not isinstance(ref, str):
            raise RecalcError(f"override key {ref!r} must be a cell reference such as 'Sheet1!B3'")
        sheet, addr = _split_ref(ref)
        if sheet is None:
            ws = book.worksheets[0]
        else:
            match = [n for n in book.sheetnames if n.upper() == sheet.upper()]
            if not match:
                raise RecalcError(f"override {ref!r}: no sheet named {sheet!r}; sheets are {', '.join(book.sheetnames)}")
            ws = book[match[0]]
        m = _COORD_RE.match(addr)
        if not m:
            raise RecalcError(f"override {ref!r}: {addr!r} is not a single cell address")
        coord = f"{m.group(1).upper()}{int(m.group(2))}"
        row, col = int(m.group(2)), column_index_from_string(m.group(1).upper())
        name = f"{ws.title}!{coord}"
        for anchor, area in ws.array_formulae.items():
            a = _parse_area(area)
            if a and a[0] <= row <= a[2] and a[1] <= col <= a[3]:
                raise RecalcError(f"override {ref!r}: {name} is in the array formula {ws.title}!{area}; only input cells can be overridden")
        cell = ws[coord]
        if cell.data_type == "f":
            raise RecalcError(f"override {ref!r}: {name} holds the formula {_formula_text(cell.value)}; only input cells can be overridden")
        if not hasattr(cell, "column"):  # MergedCell has no writable value
            raise RecalcError(f"override {ref!r}: {name} is inside a merged range")
        value = _override_value(ref, raw)
        try:
            cell.value = value
        except (AttributeError, ValueError) as exc:
            raise RecalcError(f"override {ref!r}: cannot set {name}: {exc}") from None
        if isinstance(value, str):
            cell.data_type = "s"  # text, even if it starts with "="
        written.setdefault(ws.title, {})[(row, col)] = (value, False)
    return written


def _formula_text(value) -> str:
    text = getattr(value, "text", value)
    return str(text)


def _read_book(book):
    """Formula text, array blocks and constants from the loaded openpyxl book."""
    formulas_by_cell, blocks, block_shapes, constants, sheets = {}, {}, {}, {}, []
    for ws in book.worksheets:
        max_row, max_col = ws.max_row, ws.max_column
        in_blocks = set()
        for anchor, area in ws.array_formulae.items():
            r1, c1, r2, c2 = _parse_area(area)
            max_row, max_col = max(max_row, r2), max(max_col, c2)  # openpyxl only knows the anchor
            block = _range_name(ws.title, r1, c1, r2, c2)
            text = "{" + _formula_text(ws[anchor].value) + "}"
            if (r1, c1) != (r2, c2):
                block_shapes[block] = (r2 - r1 + 1, c2 - c1 + 1)
                formulas_by_cell[block] = text
            for r in range(r1, r2 + 1):
                for c in range(c1, c2 + 1):
                    name = _cell_name(ws.title, r, c)
                    formulas_by_cell[name] = text
                    if (r1, c1) != (r2, c2):
                        blocks[name] = block
                    in_blocks.add((r, c))
        sheets.append((ws.title, max_row, max_col))
        for row in ws.iter_rows():
            for cell in row:
                if not hasattr(cell, "column") or cell.value is None or (cell.row, cell.column) in in_blocks:
                    continue
                name = _cell_name(ws.title, cell.row, cell.column)
                if cell.data_type == "f":
                    formulas_by_cell[name] = _formula_text(cell.value)
                else:
                    constants[name] = _plain_scalar(_error_token(cell))
    return formulas_by_cell, blocks, block_shapes, constants, sheets


def _check_sheet_names(book, formulas_by_cell):
    """Refuse sheet names formulas cannot evaluate rather than write #REF! into the copy."""
    for title in book.sheetnames:
        if "'" not in title:
            continue
        quoted = title.replace("'", "''").upper()
        for name, text in formulas_by_cell.items():
            if name.startswith(title + "!") or quoted in text.upper():
                raise RecalcError(
                    f"sheet {title!r} has an apostrophe in its name, which the formulas library cannot "
                    f"evaluate (cell {name}); rename the sheet"
                )


def _error_token(cell):
    if cell.data_type == "e" and cell.value in Error.errors:
        return Error.errors[cell.value]
    return cell.value


class _KeyMap:
    """Translate formulas' node ids ("'[book.xlsx]SHEET'!A1") into "Sheet!A1"."""

    def __init__(self, filename: str, sheetnames):
        self.filename = filename
        self.sheets = {s.upper(): s for s in sheetnames}

    def area(self, key):
        """(sheet, r1, c1, r2, c2) for a range in this workbook, or None."""
        try:
            rng = Ranges.get_range(key)
        except (InvalidRangeName, ValueError, TypeError):
            return None
        sheet = self.sheets.get(rng.get("sheet", "").upper())
        if sheet is None or rng.get("filename", self.filename).upper() != self.filename.upper():
            return None
        r1, r2 = max(int(rng["r1"]), 1), max(int(rng["r2"]), 1)
        return sheet, r1, max(rng["n1"], 1), r2, max(rng["n2"], 1)

    def name(self, key) -> str:
        a = self.area(key)
        if a is not None:
            return _range_name(*a)
        key = str(key)
        if "!" in key and key.split("!", 1)[0].endswith("]'"):  # a defined name: "'[book.xlsx]'!RATE"
            return key.rsplit("!", 1)[1]
        return key


def _unknown_calls(formula: str, known) -> list[str]:
    out = []
    for name in _CALL_RE.findall(formula.replace('""', "")):
        bare = name.upper()
        for prefix in ("_XLFN.", "_XLWS."):
            if bare.startswith(prefix):
                bare = bare[len(prefix):]
        if bare not in known and bare not in out:
            out.append(bare)
    return out


def _describe_failure(label: str, exc: BaseException) -> str:
    seen, cause = set(), exc
    # schedula wraps the real exception in one DispatcherError per level.
    while id(cause) not in seen:
        seen.add(id(cause))
        if isinstance(cause, _CustomFunctionFailed):
            inner = cause.exc
            return f"{label}: custom function {cause.name} failed: {type(inner).__name__}: {inner}"
        nxt = getattr(cause, "ex", None) or cause.__cause__ or cause.__context__
        if nxt is None:
            break
        cause = nxt
    return f"{label}: {type(cause).__name__}: {cause}"


def recalculate(source, target=None, *, functions: dict[str, Callable], overrides: dict[str, object] | None = None) -> Recalculation:
    """Evaluate every formula of ``source`` and write the priced copy to ``target``.

    ``functions`` maps custom worksheet function names to callables (see the
    module docstring for how values are passed). ``overrides`` maps
    "Sheet!B3" (or "B3", meaning the first sheet) to a value replacing that
    input cell before calculation; formula cells cannot be overridden.

    ``target`` defaults to ``<stem>.priced.xlsx`` (``.xlsm`` for a macro
    workbook) beside the source and must not be the source. It is written to a
    temporary file in the same folder and moved into place only when
    everything succeeded, so a failure leaves neither the source changed nor a
    partial target. The copy keeps every formula, each with its computed value
    cached; ``fullCalcOnLoad`` is dropped so programs show those values instead
    of recalculating without the custom functions.

    Raises :class:`RecalcError` for bad arguments and for a formula that fails,
    naming the cell and the reason.
    """
    src, tgt = _check_paths(source, target)
    custom = _check_functions(functions)
    run = _Run()
    t0 = time.perf_counter()
    fx = formulas.get_functions()
    model = _Model(run)
    with _REGISTRY_LOCK:
        saved = {}
        compile_empty = Empty.__dict__["compile"]
        Empty.compile = staticmethod(lambda: _OMITTED)  # an omitted argument, told apart from a typed 0
        try:
            for name, fn in custom.items():
                adapted = _adapt(name, fn, run)
                for alias in (name, f"_XLUDF.{name}"):
                    saved[alias] = fx.get(alias, _MISSING)
                    fx[alias] = adapted
            known = set(fx)
            try:
                book, context = model.add_book(str(src.resolve()))
            except Exception as exc:
                raise RecalcError(f"cannot read {src} as a workbook: {type(exc).__name__}: {exc}") from exc
            written = _apply_overrides(book, overrides)
            formulas_by_cell, blocks, block_shapes, constants, sheets = _read_book(book)
            _check_sheet_names(book, formulas_by_cell)
            real_tqdm, _fx.tqdm = _fx.tqdm, _quiet_tqdm()
            try:
                model.pushes(*book.worksheets, context=context)
                # ExcelModel.finish(circular=True), but the cycle search (a third
                # of the load time on 1,000 formulas) runs only when a cycle exists.
                model.complete()
                model.anchors()
                model.assemble()
                if _has_cycle(model.dsp):
                    model.solve_circular()
                model.inverse_references()
            except RecalcError:
                raise
            except Exception as exc:
                label = _label(run.current, _KeyMap(context["filename"], book.sheetnames)) if run.current else str(src)
                raise RecalcError(_describe_failure(label, run.failure[1] if run.failure else exc)) from exc
            finally:
                _fx.tqdm = real_tqdm
        finally:
            Empty.compile = compile_empty
            for alias, old in saved.items():
                if old is _MISSING:
                    fx.pop(alias, None)
                else:
                    fx[alias] = old
    keys = _KeyMap(context["filename"], book.sheetnames)
    t1 = time.perf_counter()

    # Wrap each cell's compiled formula so a failure names its cell, and array results fit their range.
    for node in model.dsp.function_nodes.values():
        fn = node.get("function")
        if isinstance(fn, CellWrapper) and node.get("outputs"):
            out = node["outputs"][0]
            area = keys.area(out)
            shape = (area[3] - area[1] + 1, area[4] - area[2] + 1) if area else (1, 1)
            node["function"] = _track(fn, out, shape, run)
    model.dsp.raises = True
    try:
        solution = model.calculate()
    except Exception as exc:
        label = _label(run.failure[0] if run.failure else run.current, keys)
        raise RecalcError(_describe_failure(label, run.failure[1] if run.failure else exc)) from exc
    if run.failure is not None:
        raise RecalcError(_describe_failure(_label(run.failure[0], keys), run.failure[1]))
    t2 = time.perf_counter()

    values, errors, precedents, notes, names = _collect(model, solution, keys, formulas_by_cell, blocks, block_shapes, run)
    for name in formulas_by_cell:
        if name not in block_shapes and name not in values:
            values[name] = errors[name] = CellError("#VALUE!", "not calculated")
    _explain_errors(values, errors, notes, formulas_by_cell, blocks, precedents, constants, known)

    # Formula results, then what-if inputs, go into the copy's sheet XML.
    cells: dict[str, dict] = {s: dict(v) for s, v in written.items()}
    for name in formulas_by_cell:
        if name in block_shapes:
            continue
        sheet, addr = _split_ref(name)
        r1, c1, _, _ = _parse_area(addr)
        is_anchor = name not in blocks or blocks[name].split("!", 1)[1].split(":")[0] == addr
        value = values.get(name, CellError("#VALUE!"))
        cells.setdefault(sheet, {})[(r1, c1)] = (value, is_anchor)
    try:
        with atomic_output(tgt) as tmp:
            write_values(src, tmp, cells)
    except Exception as exc:
        raise RecalcError(f"could not write {tgt}: {type(exc).__name__}: {exc}") from exc
    t3 = time.perf_counter()

    return Recalculation(
        values=types.MappingProxyType(values),
        errors=types.MappingProxyType(errors),
        target=tgt,
        source=src,
        timings=types.MappingProxyType({"load": t1 - t0, "calculate": t2 - t1, "write": t3 - t2}),
        _formulas=types.MappingProxyType(formulas_by_cell),
        _blocks=types.MappingProxyType(blocks),
        _block_shapes=types.MappingProxyType(block_shapes),
        _precedents=types.MappingProxyType(precedents),
        _constants=types.MappingProxyType(constants),
        _names=types.MappingProxyType(names),
        _sheets=tuple(sheets),
    )


_MISSING = object()


def _label(key, keys: _KeyMap) -> str:
    """A formulas node id as "Sheet!A1" (an array formula as its range)."""
    if key is None:
        return "unknown cell"
    return keys.name(key)


def _collect(model, solution, keys, formulas_by_cell, blocks, block_shapes, run):
    values: dict[str, Any] = {}
    errors: dict[str, CellError] = {}
    precedents: dict[str, tuple] = {}
    notes: dict[str, str] = {}
    names: dict[str, tuple] = {}
    for key, cell in model.cells.items():
        if isinstance(cell, Ref):
            name = keys.name(key)
            value = solution.get(key)
            value = _plain_arg(value.value if isinstance(value, Ranges) else value) if value is not None else None
            names[name.upper()] = (None, value)
            precedents[name.upper()] = tuple(keys.name(k) for k in (cell.inputs or ()) if k is not sh.SELF)
            continue
        area = keys.area(key)
        if area is None:
            continue
        name = _range_name(*area)
        if name not in formulas_by_cell:
            continue  # a constant (formulas also compiles error literals such as #N/A)
        precedents[name] = tuple(keys.name(k) for k in (cell.inputs or ()) if k is not sh.SELF)
        msg = "; ".join(run.notes.get(key, ()))
        result = solution.get(key)
        sheet, r1, c1, r2, c2 = area
        if result is None:
            grid = np.full((r2 - r1 + 1, c2 - c1 + 1), CellError("#VALUE!", "not calculated"), dtype=object)
        else:
            grid = result.value if isinstance(result, Ranges) else np.asarray(result, dtype=object)
            grid = np.asarray(grid, dtype=object).reshape(r2 - r1 + 1, c2 - c1 + 1) if grid.size == (r2 - r1 + 1) * (c2 - c1 + 1) else _fit(np.atleast_2d(grid), (r2 - r1 + 1, c2 - c1 + 1))
        for i in range(r2 - r1 + 1):
            for j in range(c2 - c1 + 1):
                cname = _cell_name(sheet, r1 + i, c1 + j)
                v = grid[i, j]
                v = v if isinstance(v, CellError) else _plain_scalar(v)
                if v is None:
                    v = 0.0  # a formula pointing at an empty cell shows 0
                if isinstance(v, CellError) and msg and not v.message:
                    v = CellError(v.code, msg)
                values[cname] = v
                if isinstance(v, CellError):
                    errors[cname] = v
        if msg:
            notes[name] = msg
    # Defined names: the formula text comes from the workbook.
    book = model.books and next(iter(model.books.values())).get(_fx.BOOK)
    if book is not None:
        for dn_name, dn in _defined_names(book):
            key = dn_name.upper()
            if key in names:
                names[key] = ("=" + dn.attr_text, names[key][1])
    return values, errors, precedents, notes, names


def _defined_names(book):
    dn = book.defined_names
    items = dn.items() if hasattr(dn, "items") else ((d.name, d) for d in dn.definedName)
    for name, d in items:
        if getattr(d, "localSheetId", None) is None:
            yield name, d


def _explain_errors(values, errors, notes, formulas_by_cell, blocks, precedents, constants, known):
    """Give each error cell a message: its own, an unknown function, or where it came from."""
    for name, err in list(errors.items()):
        if err.message:
            continue
        if err.code == "#NAME?":
            unknown = _unknown_calls(formulas_by_cell.get(name, ""), known)
            if unknown:
                errors[name] = values[name] = CellError(err.code, f"unknown function {', '.join(unknown)}")

    memo: dict[str, str | None] = {}

    def origin(name):
        """The first error cell among the precedents of ``name``, followed to its source."""
        if name in memo:
            return memo[name]
        memo[name] = None  # guards against cycles
        key = blocks.get(name, name)
        for p in precedents.get(key, ()):
            for cell in _cells_of(p):
                v = values.get(cell, constants.get(cell))
                if isinstance(v, CellError) and cell != name:
                    deeper = origin(cell) if cell in values else None
                    memo[name] = deeper or cell
                    return memo[name]
        return None

    for name, err in list(errors.items()):
        if err.message:
            continue
        src = origin(name)
        if src is None or src == name:
            continue
        src_err = values.get(src, constants.get(src))
        msg = f"from {src}" + (f": {src_err.message}" if isinstance(src_err, CellError) and src_err.message else "")
        errors[name] = values[name] = CellError(err.code, msg)


def _cells_of(name):
    sheet, addr = _split_ref(name)
    if sheet is None:
        return
    area = _parse_area(addr)
    if area is None:
        return
    r1, c1, r2, c2 = area
    if (r2 - r1 + 1) * (c2 - c1 + 1) > 100_000:  # whole columns: too many to scan for an error source
        return
    for r in range(r1, r2 + 1):
        for c in range(c1, c2 + 1):
            yield _cell_name(sheet, r, c)
