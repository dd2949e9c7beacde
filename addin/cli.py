"""The ``layerwise`` command: demo workbooks, headless pricing, traces, towers from loss tables.

Subcommands (each has ``--help``):

``layerwise demo``       build the example workbooks, price the catastrophe tower, print it
``layerwise price``      recalculate workbooks headless into priced copies (what-ifs, charts)
``layerwise trace``      show the formulas and inputs behind one cell, with their values
``layerwise tower``      price a tower straight from a CSV or Parquet loss table
``layerwise functions``  list the published LW_ worksheet functions

Exit codes (also in every ``--help``): 0 ok; 1 a workbook has error cells or
pricing failed; 2 bad usage or input.
"""
from __future__ import annotations

import argparse
import contextlib
import math
import os
import re
import shlex
import sys
import tempfile
import time
import zipfile
from collections.abc import Mapping
from pathlib import Path

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_ERRORS", "EXIT_USAGE"]

EXIT_OK, EXIT_ERRORS, EXIT_USAGE = 0, 1, 2

EPILOG = """\
exit codes:
  0  ok
  1  the workbook has error cells, or pricing failed
  2  bad usage or input (unknown option, missing or unreadable file, bad --set, bad layer text)

Prices are technical prices from the loss model and distortion you give: not
quotes, offers of cover or advice. Check them against local regulation and have
them reviewed with licensed actuarial judgement before anyone relies on them.
"""

PROGRESS_BYTES = 20_000_000  # loss tables larger than this are read with a progress bar (on a terminal)
CAUTION_LINE = "Technical prices, not quotes or advice; check against local regulation and licensed actuarial judgement."


class UsageError(Exception):
    """Bad input from the command line (exit code 2)."""


class PricingError(Exception):
    """Pricing failed (exit code 1)."""


def _out(text: str = "") -> None:
    print(text, flush=True)


def _err(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def _shown(path) -> str:
    """A path as the user would type it: relative to the working folder when inside it, quoted if needed."""
    p = Path(path)
    try:
        rel = p.resolve().relative_to(Path.cwd().resolve())
        text = str(rel)
    except ValueError:
        text = str(p)
    return shlex.quote(text)


# ================================================================== published functions
def published_functions() -> dict:
    """Name -> callable of every published LW_ function (the portfolio functions register themselves there)."""
    from .functions import FUNCTIONS

    return dict(FUNCTIONS)


# ================================================================== number formatting
def _decimals(fmt: str) -> int:
    m = re.search(r"0\.(0+)", fmt)
    return len(m.group(1)) if m else 0


def format_cell(value, number_format: str = "General") -> str:
    """A cell value as text for the terminal, following the cell's number format where it says how."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, (int, float)):
        x = float(value)
        if not math.isfinite(x):
            return "unlimited" if x > 0 else str(x)
        fmt = number_format or "General"
        if "%" in fmt:
            return f"{x:.{_decimals(fmt)}%}"
        if "#,##0" in fmt:
            return f"{x:,.{_decimals(fmt)}f}"
        if fmt != "General" and "0" in fmt:
            return f"{x:.{_decimals(fmt)}f}"
        if x == int(x) and abs(x) < 1e15:
            return f"{int(x):,}" if abs(x) >= 10_000 else str(int(x))
        return f"{x:.6g}"
    text = str(value)
    return text if len(text) <= 48 else text[:45] + "..."


def format_amount(x) -> str:
    return format_cell(x, "#,##0")


def format_ratio(x) -> str:
    return "" if x is None or (isinstance(x, float) and math.isnan(x)) else format_cell(x, "0.0%")


_UNIT_RE = re.compile(r"\s*\(([A-Z]{3})\)$")


def aligned(header: list[str], rows: list[list[str]], *, left=()) -> str:
    """A text table: columns in ``left`` (indices) left-aligned, the others (numbers) right-aligned."""
    width = [max([len(h)] + [len(r[j]) for r in rows]) for j, h in enumerate(header)]

    def line(cells):
        return "  ".join(c.ljust(w) if j in left else c.rjust(w) for j, (c, w) in enumerate(zip(cells, width))).rstrip()

    return "\n".join([line(header), line(["-" * w for w in width])] + [line(r) for r in rows])


def _table_text(rows: list[list], formats: list[list], columns=None) -> str:
    """Rows of cell values (the first is the header) as an aligned table; ``columns`` picks headers by prefix."""
    header = [str(h) if h is not None else "" for h in rows[0]]
    units = set()
    shown = []
    for h in header:
        m = _UNIT_RE.search(h)
        if m:
            units.add(m.group(1))
            h = h[:m.start()]
        shown.append(" ".join(h.split()))
    keep = [j for j, h in enumerate(shown) if h or any(r[j] not in (None, "") for r in rows[1:])]
    if columns:
        keep = [j for want in columns for j, h in enumerate(shown) if h.lower().startswith(want.lower())][: len(columns)]
        keep = list(dict.fromkeys(keep))
    body = [[format_cell(r[j], f[j]) for j in keep] for r, f in zip(rows[1:], formats[1:])]
    body = [b for b in body if any(x != "" for x in b)]
    left = {i for i, j in enumerate(keep) if all(isinstance(r[j], str) or r[j] is None for r in rows[1:])}
    text = aligned([shown[j] for j in keep], body, left=left)
    if len(units) == 1:
        text += f"\n(amounts in {units.pop()})"
    return text


def read_range(path, ref: str, *, sheet_default: str | None = None):
    """Values and number formats of a range of a (priced) workbook, as shown by its cached values."""
    from openpyxl import load_workbook
    from openpyxl.utils.cell import range_boundaries

    sheet, _, addr = ref.rpartition("!")
    sheet = sheet.strip("'") or sheet_default
    wb = load_workbook(path, data_only=True, read_only=True)
    try:
        names = {n.upper(): n for n in wb.sheetnames}
        if sheet is None:
            sheet = wb.sheetnames[0]
        if sheet.upper() not in names:
            raise UsageError(f"--show {ref}: no sheet named {sheet!r}; sheets are {', '.join(wb.sheetnames)}")
        try:
            c1, r1, c2, r2 = range_boundaries(addr.replace("$", ""))
        except (TypeError, ValueError):
            raise UsageError(f"--show {ref}: {addr!r} is not a range such as A1:D9") from None
        if None in (c1, r1, c2, r2):
            raise UsageError(f"--show {ref}: give a bounded range such as A1:D9")
        ws = wb[names[sheet.upper()]]
        values, formats = [], []
        for row in ws.iter_rows(min_row=r1, max_row=r2, min_col=c1, max_col=c2):
            values.append([getattr(c, "value", None) for c in row])
            formats.append([getattr(c, "number_format", "General") or "General" for c in row])
        width = c2 - c1 + 1
        for lst, fill in ((values, None), (formats, "General")):
            for r in lst:
                r.extend([fill] * (width - len(r)))
        return values, formats
    finally:
        wb.close()


# ================================================================== workbook pricing
def _check_workbook(path) -> Path:
    p = Path(path)
    if not p.exists():
        raise UsageError(f"workbook not found: {p}")
    if not p.is_file():
        raise UsageError(f"not a file: {p}")
    if p.suffix.lower() not in (".xlsx", ".xlsm"):
        raise UsageError(f"not an .xlsx or .xlsm workbook: {p}")
    if not zipfile.is_zipfile(p):
        raise UsageError(f"not an xlsx workbook (not a zip file): {p}")
    return p


_SET_RE = re.compile(r"^\s*(?P<ref>(?:'[^']+'|[^=!]+)![$]?[A-Za-z]{1,3}[$]?[0-9]+|[$]?[A-Za-z]{1,3}[$]?[0-9]+)\s*=(?P<value>.*)$", re.S)
_NUMBER_RE = re.compile(r"^[+-]?(\d[\d_,]*\.?\d*|\.\d+)(e[+-]?\d+)?%?$", re.I)


def parse_value(text: str):
    """A --set value: empty -> empty cell, TRUE/FALSE, a number (1e6, 2_000_000, 1,500, 35%), else text.

    Quote it ("0.35" or '0.35') to force text.
    """
    t = text.strip()
    if t == "":
        return None
    if len(t) >= 2 and t[0] == t[-1] and t[0] in "\"'":
        return t[1:-1]
    if t.upper() in ("TRUE", "FALSE"):
        return t.upper() == "TRUE"
    if _NUMBER_RE.match(t):
        pct = t.endswith("%")
        x = float(t.rstrip("%").replace("_", "").replace(",", ""))
        return x / 100.0 if pct else x
    return t


def parse_overrides(items) -> dict:
    out = {}
    for item in items or ():
        m = _SET_RE.match(item)
        if not m:
            raise UsageError(f"--set {item!r}: expected SHEET!CELL=VALUE, e.g. Tower!B13=0.4")
        out[m["ref"].strip()] = parse_value(m["value"])
    return out


@contextlib.contextmanager
def recording():
    """While active, every tower the LW_ functions price is recorded as (model, layers, distortion)."""
    from . import functions
    from layerwise.engine.layers import Layer

    calls: list = []
    real = functions.price_layers

    def record(model, layers, distortion):
        calls.append((model, [layers] if isinstance(layers, Layer) else list(layers), distortion))
        return real(model, layers, distortion)

    functions.price_layers = record
    try:
        yield calls
    finally:
        functions.price_layers = real


def _is_identity(g) -> bool:
    from layerwise.engine.distortions import TVaRDistortion

    return isinstance(g, TVaRDistortion) and g.p == 0.0


def chart_plan(calls):
    """From recorded calls: the main model, its layers (one per band), distortions by label, the main distortion."""
    per_model: dict = {}
    for model, layers, g in calls:
        entry = per_model.setdefault(model, {"layers": {}, "uses": {}})
        for lay in layers:
            band = (lay.occ_attachment, lay.occ_limit, lay.agg_attachment, lay.agg_limit)
            entry["layers"].setdefault(band, lay)
        for x in (g.values() if isinstance(g, Mapping) else [g]):
            if not _is_identity(x):
                entry["uses"][x] = entry["uses"].get(x, 0) + len(layers)
    if not per_model:
        return None
    model = max(per_model, key=lambda m: len(per_model[m]["layers"]))
    entry = per_model[model]
    layers = sorted(entry["layers"].values(), key=lambda lay: (lay.attachment, lay.limit))
    distortions = {}
    for e in per_model.values():
        for g in e["uses"]:
            distortions.setdefault(g.label(), g)
    main = max(entry["uses"], key=entry["uses"].get) if entry["uses"] else None
    return model, layers, distortions, main


def write_charts(plan, target: Path) -> list:
    """PNG charts beside the priced copy, embedded in its "Charts" sheet; returns the PNG paths."""
    from layerwise.engine.pricing import price_layers

    from . import charts, examples
    from .xlsx_images import Picture, add_image_sheet

    model, layers, distortions, main = plan
    stem = target.with_suffix("")
    pics = []
    path = charts.exceedance_chart(model, layers, f"{stem}.exceedance.png")
    pics.append(Picture(path, "Annual exceedance probability of the ground-up loss, with the priced layers shaded"))
    if distortions:
        path = charts.distortion_chart(distortions, f"{stem}.distortions.png")
        pics.append(Picture(path, "The distortions used: g(s) against the survival probability s"))
    if main is not None:
        table = price_layers(model, layers, main)
        path = charts.premium_split_chart(table, f"{stem}.premium_split.png",
                                          title=f"Expected loss, margin and capital by layer ({main.label()})")
        pics.append(Picture(path, f"Premium (expected loss + margin) and capital by layer, priced with {main.label()}"))
    add_image_sheet(target, target, pics, sheet_name="Charts", title="Charts drawn by layerwise from this workbook's model",
                    notes=[examples.CAUTION])
    return [p.path for p in pics]


def _error_cells(result) -> dict[str, str]:
    """Cells showing an error: Excel errors with their reasons, and LW_ text error values."""
    from . import cells

    out = {}
    for name, err in result.errors.items():
        out[name] = f"{err.code} {err.message}".strip()
    for name, v in result.values.items():
        if name not in out and isinstance(v, str) and cells.parse_error(v) is not None:
            out[name] = v
    return out


def _classify(exc) -> int:
    from .recalc import SourceNotFoundError

    msg = str(exc)
    if isinstance(exc, SourceNotFoundError) or msg.startswith(("source", "target", "override", "cannot read", "no sheet")):
        return EXIT_USAGE
    return EXIT_ERRORS


def price_workbook(source, target=None, *, overrides=None, charts: bool = False, quiet: bool = False):
    """Recalculate one workbook into its priced copy; returns (Recalculation, error cells, chart paths)."""
    from .recalc import RecalcError, recalculate

    src = _check_workbook(source)
    if target is not None:
        tgt = Path(target)
        if tgt.exists() and tgt.resolve() == src.resolve():
            raise UsageError(f"the priced copy {tgt} would overwrite the source workbook; choose another -o")
        if not tgt.parent.exists():
            raise UsageError(f"folder for the priced copy does not exist: {tgt.parent}")
    fns = published_functions()
    with recording() as calls:
        try:
            result = recalculate(src, target, functions=fns, overrides=overrides)
        except RecalcError as exc:
            if _classify(exc) == EXIT_USAGE:
                raise UsageError(str(exc)) from None
            raise PricingError(str(exc)) from None
    bad = _error_cells(result)
    pngs = []
    if charts:
        plan = chart_plan(calls)
        if plan is None:
            if not quiet:
                _out("No charts: no LW_ cell priced a layer in this workbook.")
        else:
            pngs = write_charts(plan, Path(result.target))
    return result, bad, pngs


def _summary(result, bad: dict, seconds: float) -> str:
    t = result.timings
    lines = [
        f"Priced copy: {_shown(result.target)}",
        f"{len(result.values):,} formula cells computed in {seconds:.1f} s "
        f"(load {t['load']:.1f} s, calculate {t['calculate']:.1f} s, write {t['write']:.1f} s)",
    ]
    if bad:
        lines.append(f"{len(bad)} error cell{'s' if len(bad) != 1 else ''}:")
        for name, msg in list(bad.items())[:25]:
            lines.append(f"  {name}: {msg}")
        if len(bad) > 25:
            lines.append(f"  ... and {len(bad) - 25} more")
    else:
        lines.append("No error cells.")
    return "\n".join(lines)


def _show_tables(target, refs, columns=None):
    for ref in refs:
        values, formats = read_range(target, ref)
        _out("")
        _out(f"{ref}:")
        _out(_table_text(values, formats, columns))


def _progress(iterable, *, total=None, desc="", unit="it", enabled=True):
    if not enabled:
        return iterable
    from tqdm import tqdm

    return tqdm(iterable, total=total, desc=desc, unit=unit, disable=None, file=sys.stderr, leave=False)


# ================================================================== subcommands
def cmd_price(args) -> int:
    from . import examples

    books = args.workbooks
    if args.output and len(books) > 1:
        raise UsageError("-o/--output names one priced copy; give a single workbook, or leave -o out")
    overrides = parse_overrides(args.set)
    for b in books:
        _check_workbook(b)
    status = EXIT_OK
    many = len(books) > 1
    for book in _progress(books, total=len(books), desc="pricing", unit="workbook", enabled=many):
        start = time.perf_counter()
        result, bad, pngs = price_workbook(book, args.output, overrides=overrides, charts=args.charts)
        if many:
            _out(f"== {_shown(book)}")
        _out(_summary(result, bad, time.perf_counter() - start))
        for p in pngs:
            _out(f"Chart: {_shown(p)}")
        if pngs:
            _out('Charts are also embedded in the priced copy\'s "Charts" sheet.')
        refs = list(args.show or ())
        cols = None
        if not refs:
            ex = examples.example_for(book)
            if ex is not None and ex.table:
                refs, cols = [ex.table], ex.table_columns or None
        _show_tables(result.target, refs, cols)
        if bad:
            status = EXIT_ERRORS
    return status


def cmd_trace(args) -> int:
    from .recalc import RecalcError

    overrides = parse_overrides(args.set)
    src = _check_workbook(args.workbook)
    with tempfile.TemporaryDirectory(prefix="layerwise-trace-") as tmp:
        result, _, _ = price_workbook(src, Path(tmp) / f"trace{src.suffix}", overrides=overrides)
        try:
            rows = result.trace(args.cell)
        except RecalcError as exc:
            raise UsageError(str(exc)) from None
        _out(result.format_trace(args.cell) if not args.depth else _trace_text(rows, args.depth))
    top = rows[0].value if rows else None
    from . import cells
    from .recalc import CellError

    failed = isinstance(top, CellError) or (isinstance(top, str) and cells.parse_error(top) is not None)
    return EXIT_ERRORS if failed else EXIT_OK


def _trace_text(rows, depth: int) -> str:
    from .recalc import format_trace

    return format_trace([r for r in rows if r.depth <= depth])


def cmd_demo(args) -> int:
    from . import examples

    folder = Path(args.folder)
    if folder.exists() and not folder.is_dir():
        raise UsageError(f"{folder} exists and is not a folder")
    _out(f"Building the example workbooks in {_shown(folder)} ...")
    paths = examples.build_examples(folder)
    for ex, p in zip(examples.EXAMPLES.values(), paths):
        _out(f"  {_shown(p):<48} {ex.title}")
    to_price = list(zip(examples.EXAMPLES.values(), paths))
    if not args.all:
        to_price = to_price[:1]
    status = EXIT_OK
    for ex, path in _progress(to_price, total=len(to_price), desc="pricing", unit="workbook", enabled=len(to_price) > 1):
        _out("")
        _out(f"Pricing {_shown(path)} headless ...")
        start = time.perf_counter()
        result, bad, pngs = price_workbook(path, charts=args.charts and ex.name == "cat_tower")
        _out(_summary(result, bad, time.perf_counter() - start))
        if bad:
            status = EXIT_ERRORS
        _out("")
        _out(f"{ex.title}:")
        values, formats = read_range(result.target, ex.table)
        _out(_table_text(values, formats, ex.table_columns or None))
        for p in pngs:
            _out(f"Chart: {_shown(p)}")
    cat = examples.EXAMPLES["cat_tower"]
    src = folder / cat.filename
    priced = src.with_name(f"{src.stem}.priced{src.suffix}")
    premium = next(k.cell for k in cat.key_cells if k.quantity == "premium")
    _out("")
    _out(f"The priced copy {_shown(priced)} keeps every formula with its value: open it in any spreadsheet program.")
    _out("Next steps:")
    _out(f"  trace a premium to its inputs:  layerwise trace {_shown(src)} {premium}")
    _out(f"  try a what-if (Wang 0.45):      layerwise price {_shown(src)} --set Tower!B13=0.45 -o {_shown(folder / 'what-if.xlsx')}")
    _out(f"  charts in the priced copy:      layerwise price {_shown(src)} --charts")
    _out(f"  price every example:            layerwise demo --all --folder {_shown(folder)}")
    _out("")
    _out(CAUTION_LINE)
    return status


# ---------------------------------------------------------------- tower from a loss table
_AMOUNT_RE = re.compile(r"^(?P<num>[+]?(?:\d[\d_]*\.?\d*|\.\d+)(?:e[+-]?\d+)?)\s*(?P<suffix>k|m|mm|mn|bn|b)?$", re.I)
_SUFFIX = {"k": 1e3, "m": 1e6, "mm": 1e6, "mn": 1e6, "b": 1e9, "bn": 1e9}
_UNLIMITED = {"unlimited", "inf", "infinity", "unl"}


def parse_amount(text: str, what: str, *, allow_unlimited: bool = False) -> float:
    """5e6, 5_000_000, 5m, 250k, 1.5bn (and 'unlimited' where allowed)."""
    t = text.strip().lower().replace(",", "")
    if allow_unlimited and t in _UNLIMITED:
        return math.inf
    m = _AMOUNT_RE.match(t)
    if not m:
        raise UsageError(f"{what}: {text.strip()!r} is not an amount (e.g. 5e6, 5_000_000, 5m, 250k)")
    return float(m["num"].replace("_", "")) * _SUFFIX.get((m["suffix"] or "").lower(), 1.0)


def _split_items(text: str) -> list[str]:
    sep = ";" if ";" in text else ","
    return [x.strip() for x in text.split(sep) if x.strip()]


_LAYER_RE = re.compile(r"^(?:(?P<share>[\d.]+)\s*%\s*(?:of\s+)?)?(?P<limit>.+?)\s+(?:xs|x|excess of)\s+(?P<att>.+)$", re.I)


def parse_layers(text: str) -> list[tuple[float, float, float]]:
    """'5e6 xs 1e6, 10e6 xs 6e6' (or ';' between layers), each optionally '40% of ...' -> (attachment, limit, share)."""
    out = []
    for item in _split_items(text):
        m = _LAYER_RE.match(item)
        if not m:
            raise UsageError(f"--layers: {item!r} is not 'LIMIT xs ATTACHMENT' (e.g. '5e6 xs 1e6' or '40% of 5m xs 1m')")
        share = 1.0
        if m["share"]:
            share = float(m["share"]) / 100.0
            if not 0 < share <= 1:
                raise UsageError(f"--layers: {item!r}: the share must lie in (0%, 100%]")
        limit = parse_amount(m["limit"], "--layers", allow_unlimited=True)
        att = parse_amount(m["att"], "--layers")
        if limit <= 0:
            raise UsageError(f"--layers: {item!r}: the limit must be > 0")
        out.append((att, limit, share))
    if not out:
        raise UsageError("--layers: no layers given")
    return out


def _read_table(path: Path, columns: list[str], *, progress: bool):
    """The named columns of a CSV or Parquet file as float arrays (read in chunks with a progress bar when large)."""
    import numpy as np
    import pandas as pd

    if not path.exists():
        raise UsageError(f"file not found: {path}")
    suffix = path.suffix.lower()
    big = progress and path.stat().st_size > PROGRESS_BYTES
    try:
        if suffix in (".parquet", ".pq"):
            try:
                import pyarrow.parquet as pq
            except ImportError:
                raise UsageError("reading Parquet needs pyarrow: pip install 'layerwise[parquet]'") from None
            pf = pq.ParquetFile(path)
            missing = [c for c in columns if c not in pf.schema_arrow.names]
            if missing:
                raise UsageError(f"{path.name}: no column {missing[0]!r}; columns are {', '.join(pf.schema_arrow.names)}")
            batches = pf.iter_batches(columns=columns, batch_size=1_000_000)
            parts = [b.to_pandas() for b in _progress(batches, total=-(-pf.metadata.num_rows // 1_000_000),
                                                      desc=f"reading {path.name}", unit="M rows", enabled=big)]
            frame = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=columns)
        elif suffix in (".csv", ".txt", ".tsv"):
            sep = "\t" if suffix == ".tsv" else ","
            head = pd.read_csv(path, sep=sep, nrows=0)
            missing = [c for c in columns if c not in head.columns]
            if missing:
                raise UsageError(f"{path.name}: no column {missing[0]!r}; columns are {', '.join(map(str, head.columns))}")
            reader = pd.read_csv(path, sep=sep, usecols=columns, chunksize=1_000_000)
            parts = list(_progress(reader, desc=f"reading {path.name}", unit="M rows", enabled=big))
            frame = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=columns)
        else:
            raise UsageError(f"{path.name}: expected a .csv, .tsv or .parquet file")
    except UsageError:
        raise
    except Exception as exc:  # pandas/pyarrow parse errors: bad input
        raise UsageError(f"cannot read {path}: {type(exc).__name__}: {exc}") from None
    out = []
    for c in columns:
        col = pd.to_numeric(frame[c], errors="coerce")
        bad = col.isna()
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            raise UsageError(f"{path.name}: column {c!r} row {i + 1} is not a number ({frame[c].iloc[i]!r})")
        out.append(col.to_numpy(dtype=float))
    return out


def cmd_tower(args) -> int:
    import layerwise.engine as lw
    from layerwise.engine.errors import InputError

    from . import handles

    if bool(args.year_loss) == bool(args.year_event):
        raise UsageError("give one loss table: --year-loss FILE or --year-event FILE")
    if bool(args.layers) == (args.stack is not None):
        raise UsageError("give the layers: --layers '5e6 xs 1e6, 10e6 xs 6e6' or --stack '5e6, 10e6' [--start X]")
    if not args.distortion:
        raise UsageError("give at least one --distortion, e.g. --distortion 'wang 0.4'")
    dists = {}
    for text in args.distortion:
        try:
            dists[text] = handles.parse_distortion(text, "distortion")
        except InputError as exc:
            raise UsageError(f"--distortion {text!r}: {exc.message}") from None
    progress = not args.no_progress
    try:
        if args.year_loss:
            cols = [args.column] + ([args.weights] if args.weights else [])
            arrays = _read_table(Path(args.year_loss), cols, progress=progress)
            model = lw.YearLossTable(arrays[0], arrays[1] if args.weights else None)
        else:
            years, losses = _read_table(Path(args.year_event), [args.year_column, args.loss_column], progress=progress)
            model = lw.YearEventTable(years, losses, args.years)
    except InputError as exc:
        raise UsageError(f"loss table: {exc.argument}: {exc.message}") from None

    basis = args.basis or ("occurrence" if model.occurrence_terms else "aggregate")
    if basis == "occurrence" and not model.occurrence_terms:
        raise UsageError("--basis occurrence: a year loss table holds annual totals only; use --basis aggregate")
    rein = None
    if args.reinstatements is not None:
        r = args.reinstatements.strip().lower()
        if r not in _UNLIMITED:
            if not r.isdigit():
                raise UsageError(f"--reinstatements {args.reinstatements!r}: a whole number or 'unlimited'")
            rein = int(r)
        if basis != "occurrence":
            raise UsageError("--reinstatements apply to per-occurrence layers (--basis occurrence)")
    if args.layers:
        terms = parse_layers(args.layers)
    else:
        start = parse_amount(args.start, "--start")
        limits = [parse_amount(x, "--stack", allow_unlimited=True) for x in re.split(r"[\s,;]+", args.stack.strip()) if x]
        if not limits:
            raise UsageError("--stack: no limits given")
        if any(not math.isfinite(x) for x in limits[:-1]):
            raise UsageError("--stack: only the top layer may be unlimited")
        atts = [start + sum(limits[:i]) for i in range(len(limits))]
        terms = [(a, lim, 1.0) for a, lim in zip(atts, limits)]
    share_all = args.share
    if not 0 < share_all <= 1:
        raise UsageError("--share must lie in (0, 1]")
    try:
        layers = []
        for a, lim, share in terms:
            s = share * share_all
            if basis == "occurrence":
                if rein is not None and not math.isfinite(lim):
                    raise UsageError("--reinstatements need finite limits")
                layers.append(lw.Layer.occurrence(a, lim, reinstatements=rein, share=s))
            else:
                layers.append(lw.Layer.aggregate(a, lim, share=s))
        start = time.perf_counter()
        frame = lw.price_layers(model, layers, dists if len(dists) > 1 else next(iter(dists.values())))
        seconds = time.perf_counter() - start
    except InputError as exc:
        raise UsageError(f"{exc.argument}: {exc.message}") from None
    except (MemoryError, ArithmeticError) as exc:
        raise PricingError(f"pricing failed: {type(exc).__name__}: {exc}") from None
    if len(dists) == 1:
        frame.insert(0, "distortion", next(iter(dists)))

    _out(f"Model: {model.describe()}; layers on the {'per-occurrence' if basis == 'occurrence' else 'annual total'} basis; "
         f"priced in {seconds:.2f} s.")
    if args.csv:
        out = Path(args.csv)
        if not out.parent.exists():
            raise UsageError(f"--csv: folder does not exist: {out.parent}")
        frame.to_csv(out, index=False)
        _out(f"Wrote {len(frame)} rows, {len(frame.columns)} columns to {_shown(out)}")
    else:
        cols = [("distortion", str), ("layer", str), ("expected loss", format_amount), ("premium", format_amount),
                ("loss ratio", format_ratio), ("rate on line", format_ratio), ("capital", format_amount),
                ("return on capital", format_ratio)]
        if len(dists) == 1:
            _out(f"Distortion: {next(iter(dists.values())).label()}")
            cols = cols[1:]
        rows = [[fmt(rec[name.replace(" ", "_")]) for name, fmt in cols] for rec in frame.to_dict("records")]
        _out(aligned([name for name, _ in cols], rows, left={0, 1} if len(dists) > 1 else {0}))
    _out(CAUTION_LINE)
    return EXIT_OK


def cmd_functions(args) -> int:
    fns = published_functions()
    if args.name:
        key = args.name.upper()
        if key not in fns:
            raise UsageError(f"no function named {args.name!r}; run 'layerwise functions' for the list")
        meta = fns[key].__xlfunc__
        _out(f"{_signature(meta)}")
        _out(f"  {meta['ret']['doc']}")
        for a in meta["args"]:
            opt = " (optional)" if "optional" in a else ""
            _out(f"  {a['name']}{opt}: {a['doc']}")
        return EXIT_OK
    for name in sorted(fns):
        meta = getattr(fns[name], "__xlfunc__", None)
        if meta is None:
            _out(name)
            continue
        _out(_signature(meta))
        _out(f"    {meta['ret']['doc']}")
    _out("")
    _out(f"{len(fns)} functions. 'layerwise functions NAME' shows the help of each argument.")
    return EXIT_OK


def _signature(meta) -> str:
    args = [f"[{a['name']}]" if "optional" in a else a["name"] for a in meta["args"]]
    return f"{meta['name']}({', '.join(args)})"


# ================================================================== parser
class _Formatter(argparse.RawDescriptionHelpFormatter):
    pass


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="layerwise",
        description="Price insurance and reinsurance layers with distortion risk measures: example workbooks, "
                    "headless recalculation of workbooks that use the LW_ functions, traces, and towers from "
                    "loss tables.",
        epilog=EPILOG, formatter_class=_Formatter,
    )
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def add(name, help_text, description, func):
        sp = sub.add_parser(name, help=help_text, description=description, epilog=EPILOG, formatter_class=_Formatter)
        sp.set_defaults(func=func)
        return sp

    d = add("demo", "build the example workbooks and price the catastrophe tower",
            "Write the example workbooks (invented data) into a folder, price the property-catastrophe tower "
            "headless, print the priced tower and say where the priced copy is. Existing example files in the "
            "folder are replaced.", cmd_demo)
    d.add_argument("--folder", default="layerwise-demo", help="where to write the workbooks (default: ./layerwise-demo)")
    d.add_argument("--all", action="store_true", help="price every example workbook, not only the tower")
    d.add_argument("--charts", action="store_true", help="also draw charts for the tower and embed them in its priced copy")

    pr = add("price", "recalculate workbooks headless into priced copies",
             "Evaluate every formula of each workbook (the LW_ functions included) and write a priced copy that "
             "keeps the formulas and shows their values in any spreadsheet program. The input is never "
             "overwritten. Prints the cells computed, every error cell with its reason, and the time taken.",
             cmd_price)
    pr.add_argument("workbooks", nargs="+", metavar="WORKBOOK", help=".xlsx or .xlsm workbook(s)")
    pr.add_argument("-o", "--output", metavar="OUT", help="priced copy (default: WORKBOOK.priced.xlsx beside it)")
    pr.add_argument("--set", action="append", metavar="SHEET!CELL=VALUE",
                    help="what-if: replace an input cell before pricing (repeatable); VALUE is a number (1e6, 35%%), "
                         "TRUE/FALSE, text, or empty; quote it to force text")
    pr.add_argument("--charts", action="store_true",
                    help="draw PNG charts (exceedance curve with the layers, distortions, premium split) beside the "
                         "priced copy and embed them in its extra 'Charts' sheet")
    pr.add_argument("--show", action="append", metavar="RANGE",
                    help="print a range of the priced copy as a table, e.g. Tower!A16:M22 (repeatable; "
                         "default for the example workbooks: their tower table)")

    tr = add("trace", "show the formulas and inputs feeding a cell",
             "Recalculate the workbook (nothing is written beside it) and print the chain of formulas and inputs "
             "that feed CELL, down to constants, with every intermediate value. Exit code 1 when the cell shows "
             "an error.", cmd_trace)
    tr.add_argument("workbook", metavar="WORKBOOK")
    tr.add_argument("cell", metavar="CELL", help="e.g. Tower!G17 (a cell on the first sheet without a sheet name)")
    tr.add_argument("--set", action="append", metavar="SHEET!CELL=VALUE", help="what-if overrides, as for price")
    tr.add_argument("--depth", type=int, default=0, help="show only this many levels below the cell (default: all)")

    tw = add("tower", "price a tower from a CSV or Parquet loss table",
             "Price layers straight from a year loss table (one annual loss per simulated year) or a year-event "
             "table (one row per event, with its simulated year), without a workbook. Amounts accept 5e6, "
             "5_000_000, 5m, 250k, 1.5bn; limits also 'unlimited'.", cmd_tower)
    src = tw.add_argument_group("loss table (one of)")
    src.add_argument("--year-loss", metavar="FILE", help="year loss table (.csv, .tsv or .parquet)")
    src.add_argument("--column", default="loss", help="annual loss column of --year-loss (default: loss)")
    src.add_argument("--weights", metavar="COLUMN", help="optional weight column of --year-loss")
    src.add_argument("--year-event", metavar="FILE", help="year-event table (.csv, .tsv or .parquet)")
    src.add_argument("--year-column", default="year", help="year column of --year-event, numbered 1, 2, ... (default: year)")
    src.add_argument("--loss-column", default="loss", help="event loss column of --year-event (default: loss)")
    src.add_argument("--years", type=int, metavar="N", help="simulated years, including years without events "
                                                            "(default: the largest year number)")
    lay = tw.add_argument_group("layers (one of)")
    lay.add_argument("--layers", metavar="TEXT", help="e.g. '5e6 xs 1e6, 10e6 xs 6e6' or '40%% of 5m xs 1m; 10m xs 6m'")
    lay.add_argument("--stack", metavar="LIMITS", help="contiguous layers of these limits, e.g. '5e6, 10e6, 25e6'")
    lay.add_argument("--start", default="0", help="attachment of the lowest --stack layer (default: 0)")
    terms = tw.add_argument_group("terms and pricing")
    terms.add_argument("--distortion", action="append", metavar="TEXT",
                       help="e.g. 'wang 0.4', 'ph 0.8', 'dual_power 1.5', 'tvar 99%%', 'cost_of_capital 0.1' (repeatable)")
    terms.add_argument("--basis", choices=["occurrence", "aggregate"],
                       help="per occurrence (each event) or on the annual total (default: occurrence for "
                            "year-event tables, aggregate for year loss tables)")
    terms.add_argument("--reinstatements", metavar="N", help="reinstatements of each per-occurrence layer (default: unlimited)")
    terms.add_argument("--share", type=float, default=1.0, help="share written of every layer, in (0, 1] (default: 1)")
    outp = tw.add_argument_group("output")
    outp.add_argument("--csv", metavar="OUT", help="write the full priced table (every column) to this CSV file")
    outp.add_argument("--no-progress", action="store_true", help="no progress bar while reading large files")

    fn = add("functions", "list the published LW_ worksheet functions",
             "List the LW_ worksheet functions with their arguments ([optional] in brackets) and a one-line "
             "description; with NAME, the help text of each argument.", cmd_functions)
    fn.add_argument("name", nargs="?", metavar="NAME", help="one function, e.g. LW_PREMIUM")

    # Listed here for the overview; main() hands their arguments to the modules' own parsers.
    for name, help_text in _DELEGATED_HELP.items():
        sub.add_parser(name, help=help_text, add_help=False)
    return p


_DELEGATED_HELP = {
    "reference": "print, write or check the function reference (addin/REFERENCE.md)",
    "excel": "write a macro-enabled workbook (or xlwings.conf) that loads the LW_ functions into desktop Excel",
    "export": "write the LW_ functions and the engine as one .py file for a Python without this package",
}


def _delegated(name):
    if name == "reference":
        from .reference import reference_main

        return reference_main
    if name == "excel":
        from .excel_setup import excel_main

        return excel_main
    from .export import export_main

    return export_main


def main(argv=None) -> int:
    """Run the command line; returns the exit code (0 ok, 1 error cells or pricing failed, 2 bad usage)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] in _DELEGATED_HELP:
        return int(_delegated(argv[0])(argv[1:]) or 0)
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except UsageError as exc:
        _err(f"layerwise {args.command}: error: {exc}")
        return EXIT_USAGE
    except PricingError as exc:
        _err(f"layerwise {args.command}: pricing failed: {exc}")
        return EXIT_ERRORS
    except KeyboardInterrupt:
        _err("interrupted")
        return 130
    except BrokenPipeError:  # e.g. piped into head: stop quietly
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_ERRORS


if __name__ == "__main__":
    sys.exit(main())
