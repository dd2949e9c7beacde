"""Write cached cell values into an existing .xlsx without touching anything else.

openpyxl can store either a formula or a value in a cell, never both, so a
workbook saved by it opens with empty formula cells in any program that does
not recalculate. This module copies the xlsx zip entry by entry and edits only
the ``<sheetData>`` of the worksheets it is told about:

* formula cells keep their ``<f>`` element and get a ``<v>`` with the computed
  value and the matching cell type (number, ``t="str"``, ``t="b"``, ``t="e"``);
* plain cells (the other cells of an array-formula range, or what-if inputs)
  get a value, and are created, with their row, where the sheet has none.

The edit is textual (regular expressions over the sheet XML) rather than a
parse and re-serialise, because the standard library's ElementTree renames
namespace prefixes and drops unused declarations, which breaks the
``mc:Ignorable`` attributes Excel relies on. Styles, charts, VBA parts, defined
names and every other byte of the package are copied unchanged.

Values are plain Python: ``bool``, ``int``/``float``, ``str``, ``None`` (empty
cell) or any object with a string attribute ``code`` holding an Excel error code
such as ``"#DIV/0!"``.
"""
from __future__ import annotations

import math
import os
import posixpath
import re
import tempfile
import zipfile
from pathlib import Path
from xml.etree import ElementTree as ET

from openpyxl.utils.cell import column_index_from_string, get_column_letter, range_boundaries

__all__ = ["sheet_parts", "patch_sheet_xml", "write_values", "atomic_output"]

_NS_MAIN = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_NS_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_NS_PKG_REL = "http://schemas.openxmlformats.org/package/2006/relationships"

# Elements are matched with an optional namespace prefix because some writers
# (the OpenXML SDK among them) emit <x:c> instead of <c>.
_P = r"(?:[A-Za-z_][\w.-]*:)?"
_SHEETDATA_RE = re.compile(rf"<({_P})sheetData\b([^>]*?)(/>|>(.*?)</{_P}sheetData\s*>)", re.S)
_ROW_RE = re.compile(rf"<{_P}row\b([^>]*?)(?:/>|>(.*?)</{_P}row\s*>)", re.S)
_CELL_RE = re.compile(rf"<{_P}c\b([^>]*?)(?:/>|>(.*?)</{_P}c\s*>)", re.S)
_F_RE = re.compile(rf"<{_P}f\b[^>]*?(?:/>|>.*?</{_P}f\s*>)", re.S)
_VALUE_RE = re.compile(rf"<{_P}(?:v|is)\b[^>]*?(?:/>|>.*?</{_P}(?:v|is)\s*>)", re.S)
_ATTR_RE = re.compile(r"""([\w:.-]+)\s*=\s*("[^"]*"|'[^']*')""")
_DIMENSION_RE = re.compile(rf"<({_P})dimension\b([^>]*?)/>", re.S)
_CALCPR_RE = re.compile(rf"<{_P}calcPr\b[^>]*>", re.S)
_COORD_RE = re.compile(r"^\$?([A-Za-z]{1,3})\$?(\d+)$")
# Characters XML 1.0 forbids; Excel escapes them as _xHHHH_.
_ILLEGAL_XML_RE = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")


def _attrs(text: str) -> list[list[str]]:
    return [[name, value[1:-1]] for name, value in _ATTR_RE.findall(text or "")]


def _attr(attrs, name):
    for key, value in attrs:
        if key == name:
            return value
    return None


def _set_attr(attrs, name, value):
    """Set (or with value None remove) an attribute, keeping the others in order."""
    for i, (key, _) in enumerate(attrs):
        if key == name:
            if value is None:
                del attrs[i]
            else:
                attrs[i][1] = value
            return
    if value is not None:
        attrs.append([name, value])


def _attr_text(attrs) -> str:
    return "".join(f' {k}="{v}"' for k, v in attrs)


def _escape(text: str) -> str:
    text = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    return _ILLEGAL_XML_RE.sub(lambda m: f"_x{ord(m.group(0)):04X}_", text)


def _number_text(x: float) -> str:
    if float(x).is_integer() and abs(x) < 1e15:
        return str(int(x))
    return repr(float(x))


def encode_value(value, *, formula: bool, prefix: str = ""):
    """Return (cell type attribute or None, inner XML) for a value.

    Formula cells carry strings as ``t="str"`` with a ``<v>``; plain cells carry
    them as inline strings, which need no shared-string table entry. ``prefix``
    is the sheet's namespace prefix with its colon ("" for the default).
    """
    v, p = f"{prefix}v", prefix
    code = getattr(value, "code", None)
    if isinstance(code, str):
        return "e", f"<{v}>{_escape(code)}</{v}>"
    if value is None:
        return None, ""
    if isinstance(value, bool):
        return "b", f"<{v}>{int(value)}</{v}>"
    if isinstance(value, (int, float)):
        x = float(value)
        if not math.isfinite(x):
            return "e", f"<{v}>#NUM!</{v}>"
        return None, f"<{v}>{_number_text(x)}</{v}>"
    if isinstance(value, str):
        if formula:
            return "str", f"<{v}>{_escape(value)}</{v}>"
        space = ' xml:space="preserve"' if value != value.strip() else ""
        return "inlineStr", f"<{p}is><{p}t{space}>{_escape(value)}</{p}t></{p}is>"
    raise TypeError(f"cannot store a {type(value).__name__} in a cell: {value!r}")


def _cell_xml(prefix, attrs, inner) -> str:
    if inner:
        return f"<{prefix}c{_attr_text(attrs)}>{inner}</{prefix}c>"
    return f"<{prefix}c{_attr_text(attrs)}/>"


def _patch_cell(prefix, attrs, inner, value, formula):
    inner = inner or ""
    f_match = _F_RE.search(inner)
    if formula and f_match is None:
        raise ValueError(f"cell {_attr(attrs, 'r')} has no formula in the sheet XML")
    t, v = encode_value(value, formula=bool(f_match), prefix=prefix)
    rest = _VALUE_RE.sub("", _F_RE.sub("", inner))  # e.g. <extLst>, kept after the value
    head = f_match.group(0) if f_match else ""
    _set_attr(attrs, "t", t)
    return _cell_xml(prefix, attrs, head + v + rest)


def _row_num(attrs, previous):
    r = _attr(attrs, "r")
    return int(r) if r else previous + 1


def _coord_col(ref):
    m = _COORD_RE.match(ref or "")
    return column_index_from_string(m.group(1).upper()) if m else None


def _patch_row(prefix, row_num, row_attrs, inner, updates):
    """Rewrite one row's cells; updates maps column -> (value, is_formula)."""
    pieces, pos, col, present = [], 0, 0, []
    inner = inner or ""
    for m in _CELL_RE.finditer(inner):
        attrs = _attrs(m.group(1))
        ref_col = _coord_col(_attr(attrs, "r"))
        col = ref_col if ref_col is not None else col + 1
        pieces.append((None, inner[pos:m.start()]))  # whitespace between cells
        if col in updates:
            _set_attr(attrs, "r", f"{get_column_letter(col)}{row_num}")
            value, formula = updates[col]
            pieces.append((col, _patch_cell(prefix, attrs, m.group(2), value, formula)))
        else:
            pieces.append((col, m.group(0)))
        present.append(col)
        pos = m.end()
    tail = inner[pos:]
    missing = sorted(set(updates) - set(present))
    for c in missing:
        value, formula = updates[c]
        if formula:
            raise ValueError(f"formula cell {get_column_letter(c)}{row_num} is missing from the sheet XML")
        t, v = encode_value(value, formula=False, prefix=prefix)
        attrs = [["r", f"{get_column_letter(c)}{row_num}"]]
        _set_attr(attrs, "t", t)
        xml = _cell_xml(prefix, attrs, v)
        # Insert before the first existing cell with a larger column: cells must stay in order.
        for i, (pc, _) in enumerate(pieces):
            if pc is not None and pc > c:
                pieces.insert(i, (c, xml))
                break
        else:
            pieces.append((c, xml))
    if missing:
        spans = _attr(row_attrs, "spans")
        if spans and re.fullmatch(r"\d+:\d+", spans):
            lo, hi = map(int, spans.split(":"))
            _set_attr(row_attrs, "spans", f"{min([lo] + missing)}:{max([hi] + missing)}")
    body = "".join(text for _, text in pieces) + tail
    _set_attr(row_attrs, "r", str(row_num))
    if body:
        return f"<{prefix}row{_attr_text(row_attrs)}>{body}</{prefix}row>"
    return f"<{prefix}row{_attr_text(row_attrs)}/>"


def _dimension(xml, cells):
    """Widen <dimension ref> so it covers every cell written."""
    m = _DIMENSION_RE.search(xml)
    if not m or not cells:
        return xml
    attrs = _attrs(m.group(2))
    rows = [r for r, _ in cells]
    cols = [c for _, c in cells]
    lo_c, lo_r, hi_c, hi_r = min(cols), min(rows), max(cols), max(rows)
    ref = _attr(attrs, "ref")
    try:
        a, b, c, d = range_boundaries(ref)
        if None not in (a, b, c, d):
            lo_c, lo_r, hi_c, hi_r = min(lo_c, a), min(lo_r, b), max(hi_c, c), max(hi_r, d)
    except (TypeError, ValueError):
        pass
    new = f"{get_column_letter(lo_c)}{lo_r}"
    if (lo_c, lo_r) != (hi_c, hi_r):
        new += f":{get_column_letter(hi_c)}{hi_r}"
    _set_attr(attrs, "ref", new)
    return xml[:m.start()] + f"<{m.group(1)}dimension{_attr_text(attrs)}/>" + xml[m.end():]


def patch_sheet_xml(xml: str, cells: dict) -> str:
    """Return sheet XML with values written.

    ``cells`` maps (row, column) (1-based) to ``(value, is_formula)``. A formula
    cell must already exist with an ``<f>``; other cells are created when absent.
    """
    if not cells:
        return xml
    m = _SHEETDATA_RE.search(xml)
    if m is None:
        raise ValueError("worksheet XML has no <sheetData>")
    prefix = m.group(1)
    inner = m.group(4) or ""
    by_row: dict[int, dict[int, tuple]] = {}
    for (r, c), spec in cells.items():
        by_row.setdefault(r, {})[c] = spec
    pieces, pos, row_num = [], 0, 0
    done = set()
    for rm in _ROW_RE.finditer(inner):
        attrs = _attrs(rm.group(1))
        row_num = _row_num(attrs, row_num)
        pieces.append((None, inner[pos:rm.start()]))
        if row_num in by_row:
            pieces.append((row_num, _patch_row(prefix, row_num, attrs, rm.group(2), by_row[row_num])))
            done.add(row_num)
        else:
            pieces.append((row_num, rm.group(0)))
        pos = rm.end()
    tail = inner[pos:]
    for r in sorted(set(by_row) - done):
        xml_row = _patch_row(prefix, r, [], "", by_row[r])
        for i, (pr, _) in enumerate(pieces):
            if pr is not None and pr > r:
                pieces.insert(i, (r, xml_row))
                break
        else:
            pieces.append((r, xml_row))
    body = "".join(text for _, text in pieces) + tail
    new = f"<{prefix}sheetData{m.group(2)}>{body}</{prefix}sheetData>"
    xml = xml[:m.start()] + new + xml[m.end():]
    return _dimension(xml, list(cells))


def sheet_parts(archive: zipfile.ZipFile) -> dict[str, str]:
    """Map each worksheet name to its part name inside the zip (e.g. xl/worksheets/sheet1.xml)."""
    return _package_parts(archive)[1]


def _package_parts(archive):
    names = set(archive.namelist())
    wb_part = "xl/workbook.xml"
    rels_part = "xl/_rels/workbook.xml.rels"
    # The workbook part is normally xl/workbook.xml; follow the root relationship when it is not.
    if "_rels/.rels" in names:
        root = ET.fromstring(archive.read("_rels/.rels"))
        for rel in root.iter(f"{{{_NS_PKG_REL}}}Relationship"):
            if rel.get("Type", "").endswith("/officeDocument"):
                wb_part = rel.get("Target", wb_part).lstrip("/")
                folder, base = posixpath.split(wb_part)
                rels_part = posixpath.join(folder, "_rels", base + ".rels")
    if wb_part not in names:
        raise ValueError("not an xlsx workbook: no workbook part")
    targets = {}
    if rels_part in names:
        for rel in ET.fromstring(archive.read(rels_part)).iter(f"{{{_NS_PKG_REL}}}Relationship"):
            target = rel.get("Target", "")
            if target.startswith("/"):
                target = target.lstrip("/")
            else:
                target = posixpath.normpath(posixpath.join(posixpath.dirname(wb_part), target))
            targets[rel.get("Id")] = target
    parts = {}
    for sheet in ET.fromstring(archive.read(wb_part)).iter(f"{{{_NS_MAIN}}}sheet"):
        part = targets.get(sheet.get(f"{{{_NS_REL}}}id"))
        if part in names:
            parts[sheet.get("name")] = part
    return wb_part, parts


def _drop_full_calc_on_load(xml: str) -> str:
    # fullCalcOnLoad asks the opening program to recalculate everything, which
    # would replace the cached values with #NAME? where the custom functions are absent.
    def fix(m):
        return re.sub(r"""\s+fullCalcOnLoad\s*=\s*("[^"]*"|'[^']*')""", "", m.group(0))
    return _CALCPR_RE.sub(fix, xml)


def write_values(source, target, values: dict[str, dict]) -> None:
    """Copy the xlsx at ``source`` to ``target`` with values written.

    ``values`` maps a sheet name to the ``cells`` mapping of :func:`patch_sheet_xml`.
    ``target`` is written directly; use :func:`atomic_output` for an atomic replace.
    """
    with zipfile.ZipFile(source) as src:
        wb_part, parts = _package_parts(src)
        unknown = set(values) - set(parts)
        if unknown:
            raise ValueError(f"no worksheet named {sorted(unknown)[0]!r} in {source}")
        edits = {parts[name]: cells for name, cells in values.items() if cells}
        with zipfile.ZipFile(target, "w", zipfile.ZIP_DEFLATED) as dst:
            for info in src.infolist():
                data = src.read(info)
                if info.filename in edits:
                    data = patch_sheet_xml(data.decode("utf-8"), edits[info.filename]).encode("utf-8")
                elif info.filename == wb_part:
                    data = _drop_full_calc_on_load(data.decode("utf-8")).encode("utf-8")
                dst.writestr(info, data, compress_type=info.compress_type)


class atomic_output:
    """Context manager giving a temporary path beside ``target``; on success it replaces ``target``.

    On an exception the temporary file is removed and ``target`` is left as it was.
    """

    def __init__(self, target):
        self.target = Path(target)
        self.tmp: Path | None = None

    def __enter__(self) -> Path:
        fd, name = tempfile.mkstemp(prefix=f".{self.target.name}.", suffix=".tmp", dir=self.target.parent)
        os.close(fd)
        self.tmp = Path(name)
        # mkstemp makes the file private; give the result the usual permissions.
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(self.tmp, 0o666 & ~umask)
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                with open(self.tmp, "rb+") as fh:
                    os.fsync(fh.fileno())
                os.replace(self.tmp, self.target)
                _fsync_folder(self.target.parent)  # the rename itself survives a power cut
        finally:
            if self.tmp.exists():
                self.tmp.unlink()
        return False


def _fsync_folder(folder: Path) -> None:
    """Flush a folder's entry list (POSIX); where folders cannot be opened (Windows) this does nothing."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
