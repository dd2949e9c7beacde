"""Add a worksheet of PNG images to an existing .xlsx, leaving every other part as it was.

A priced copy (see :mod:`layerwise.addin.recalc`) holds formulas *and* their
cached values, which openpyxl cannot keep together: loading it with openpyxl
and saving it again would drop the cached values (and any charts or pictures
already in the file). So images are added the way cached values are written,
at the level of the zip package: :func:`add_image_sheet` copies every entry
and adds

* a worksheet part with a title (and optional caption lines) in column A,
* a drawing part anchoring each picture below the previous one,
* the PNG files under ``xl/media/``,
* the relationships and content types that tie them in, and the sheet's
  entry at the end of the workbook's sheet list (so existing sheet indices,
  used by print areas and other sheet-local names, do not change).

The result opens in Excel, LibreOffice and openpyxl. The output is written
atomically (see :func:`layerwise.addin.xlsx_values.atomic_output`); the source
may be the target.
"""
from __future__ import annotations

import posixpath
import re
import struct
import textwrap
import zipfile
from dataclasses import dataclass
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

from .xlsx_values import _package_parts, atomic_output

__all__ = ["Picture", "add_image_sheet", "png_size"]

_NS_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_NS_MAIN = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_T_WORKSHEET = _NS_REL + "/worksheet"
_T_DRAWING = _NS_REL + "/drawing"
_T_IMAGE = _NS_REL + "/image"
_CT_WORKSHEET = "application/vnd.openxmlformats-officedocument.spreadsheetml.worksheet+xml"
_CT_DRAWING = "application/vnd.openxmlformats-officedocument.drawing+xml"
_EMU_PER_PX = 9525  # at 96 pixels per inch
_ROW_PX = 20  # default row height, 15 points
_WRAP_AT = 110  # characters per line of the title and notes
_SHEET_NAME_BAD = re.compile(r"[\[\]:*?/\\]")


@dataclass(frozen=True)
class Picture:
    """A PNG file, its caption (one line above it) and its displayed width in pixels (height keeps the aspect)."""

    path: Path
    caption: str = ""
    width_px: int | None = None


def png_size(path) -> tuple[int, int]:
    """(width, height) in pixels, from the PNG header."""
    with open(path, "rb") as fh:
        head = fh.read(24)
    if len(head) < 24 or head[:8] != b"\x89PNG\r\n\x1a\n" or head[12:16] != b"IHDR":
        raise ValueError(f"{path} is not a PNG file")
    return struct.unpack(">II", head[16:24])


def _unused(names: set[str], pattern: str) -> str:
    i = 1
    while pattern.format(i) in names:
        i += 1
    return pattern.format(i)


def _rel_id(xml: str) -> str:
    used = set(re.findall(r'\bId\s*=\s*"([^"]*)"', xml))
    return _unused(used, "rId{}")


def _relative(from_part: str, to_part: str) -> str:
    return posixpath.relpath(to_part, posixpath.dirname(from_part))


def _rels_part(part: str) -> str:
    folder, base = posixpath.split(part)
    return posixpath.join(folder, "_rels", base + ".rels")


def _add_relationship(xml: str | None, rid: str, rtype: str, target: str) -> str:
    rel = f'<Relationship Id="{rid}" Type="{rtype}" Target={quoteattr(target)}/>'
    if xml is None:
        return ('<?xml version="1.0" encoding="UTF-8" standalone="yes"?>\n'
                f'<Relationships xmlns="http://schemas.openxmlformats.org/package/2006/relationships">{rel}</Relationships>')
    i = xml.rindex("</Relationships>")
    return xml[:i] + rel + xml[i:]


def _add_content_types(xml: str, overrides: dict[str, str]) -> str:
    add = ""
    if not re.search(r'<Default\b[^>]*Extension\s*=\s*"png"', xml, re.I):
        add += '<Default Extension="png" ContentType="image/png"/>'
    for part, ctype in overrides.items():
        add += f'<Override PartName="/{part}" ContentType="{ctype}"/>'
    i = xml.rindex("</Types>")
    return xml[:i] + add + xml[i:]


def _add_sheet_entry(xml: str, name: str, rid: str) -> str:
    m = re.search(r"<((?:[A-Za-z_][\w.-]*:)?)sheets\b[^>]*>", xml)
    if m is None:
        raise ValueError("workbook part has no <sheets> list")
    prefix = m.group(1)
    ids = [int(x) for x in re.findall(r"<(?:[A-Za-z_][\w.-]*:)?sheet\b[^>]*?\bsheetId\s*=\s*\"(\d+)\"", xml)]
    sheet_id = max(ids, default=0) + 1
    # the prefix bound to the relationships namespace (usually r:), or a local declaration
    bound = re.search(r"xmlns:([A-Za-z_][\w.-]*)\s*=\s*\"" + re.escape(_NS_REL) + '"', xml)
    if bound:
        rattr = f'{bound.group(1)}:id="{rid}"'
    else:
        rattr = f'xmlns:lwr="{_NS_REL}" lwr:id="{rid}"'
    entry = f"<{prefix}sheet name={quoteattr(name)} sheetId=\"{sheet_id}\" {rattr}/>"
    close = xml.index(f"</{prefix}sheets>", m.end())
    return xml[:close] + entry + xml[close:]


def _sheet_xml(lines: list[tuple[int, str]]) -> str:
    rows = []
    for r, text in lines:  # in the workbook's default style: other styles would mean editing styles.xml
        space = ' xml:space="preserve"' if text != text.strip() else ""
        rows.append(f'<row r="{r}"><c r="A{r}" t="inlineStr"><is><t{space}>{escape(text)}</t></is></c></row>')
    return (
        '<?xml version="1.0" encoding="UTF-8" standalone="yes"?>\n'
        f'<worksheet xmlns="{_NS_MAIN}" xmlns:r="{_NS_REL}">'
        '<sheetPr><pageSetUpPr fitToPage="1"/></sheetPr>'
        '<sheetViews><sheetView workbookViewId="0" showGridLines="0"/></sheetViews>'
        '<sheetFormatPr defaultRowHeight="15"/>'
        f'<sheetData>{"".join(rows)}</sheetData>'
        '<pageMargins left="0.5" right="0.5" top="0.6" bottom="0.6" header="0.3" footer="0.3"/>'
        '<pageSetup orientation="portrait" fitToWidth="1" fitToHeight="0"/>'  # one page wide
        '<drawing r:id="rId1"/>'
        "</worksheet>"
    )


def _drawing_xml(anchors: list[tuple[int, int, int, str, str]]) -> str:
    """anchors: (row index from 0, width px, height px, image relationship id, description)."""
    out = []
    for i, (row, w, h, rid, descr) in enumerate(anchors, start=1):
        cx, cy = w * _EMU_PER_PX, h * _EMU_PER_PX
        out.append(
            "<xdr:oneCellAnchor>"
            f"<xdr:from><xdr:col>0</xdr:col><xdr:colOff>0</xdr:colOff><xdr:row>{row}</xdr:row><xdr:rowOff>0</xdr:rowOff></xdr:from>"
            f'<xdr:ext cx="{cx}" cy="{cy}"/>'
            "<xdr:pic>"
            f'<xdr:nvPicPr><xdr:cNvPr id="{i + 1}" name="Picture {i}" descr={quoteattr(descr)}/>'
            '<xdr:cNvPicPr><a:picLocks noChangeAspect="1"/></xdr:cNvPicPr></xdr:nvPicPr>'
            f'<xdr:blipFill><a:blip r:embed="{rid}"/><a:stretch><a:fillRect/></a:stretch></xdr:blipFill>'
            f'<xdr:spPr><a:xfrm><a:off x="0" y="0"/><a:ext cx="{cx}" cy="{cy}"/></a:xfrm>'
            '<a:prstGeom prst="rect"><a:avLst/></a:prstGeom></xdr:spPr>'
            "</xdr:pic><xdr:clientData/></xdr:oneCellAnchor>"
        )
    return (
        '<?xml version="1.0" encoding="UTF-8" standalone="yes"?>\n'
        '<xdr:wsDr xmlns:xdr="http://schemas.openxmlformats.org/drawingml/2006/spreadsheetDrawing" '
        f'xmlns:a="http://schemas.openxmlformats.org/drawingml/2006/main" xmlns:r="{_NS_REL}">'
        + "".join(out) + "</xdr:wsDr>"
    )


def _check_name(name: str, existing) -> str:
    if not name or len(name) > 31 or _SHEET_NAME_BAD.search(name) or name.startswith("'") or name.endswith("'"):
        raise ValueError(f"{name!r} is not a valid sheet name (1-31 characters, none of []:*?/\\, no leading or trailing ')")
    taken = {s.upper() for s in existing}
    if name.upper() not in taken:
        return name
    for i in range(2, 100):
        candidate = f"{name[:27]} ({i})"
        if candidate.upper() not in taken:
            return candidate
    raise ValueError(f"too many sheets named like {name!r}")


def add_image_sheet(source, target, pictures, *, sheet_name: str = "Charts", title: str = "",
                    notes=()) -> str:
    """Copy the xlsx ``source`` to ``target`` with a new last sheet showing ``pictures``; returns the sheet's name.

    ``pictures`` are :class:`Picture` objects (or paths). ``title`` and ``notes``
    are text lines at the top of the sheet; each picture has its caption on
    the line above it. If ``sheet_name`` is taken, " (2)", " (3)", ... is added.
    """
    pics = [p if isinstance(p, Picture) else Picture(Path(p)) for p in pictures]
    if not pics:
        raise ValueError("no pictures given")
    sizes = []
    for p in pics:
        w, h = png_size(p.path)
        if p.width_px:
            h, w = round(h * p.width_px / w), int(p.width_px)
        sizes.append((w, h))
    with zipfile.ZipFile(source) as src:
        names = set(src.namelist())
        wb_part, parts = _package_parts(src)
        name = _check_name(sheet_name, parts)
        sheet_part = _unused(names, "xl/worksheets/sheet{}.xml")
        drawing_part = _unused(names, "xl/drawings/drawing{}.xml")
        media, k = [], 1
        for _ in pics:
            while f"xl/media/image{k}.png" in names:
                k += 1
            media.append(f"xl/media/image{k}.png")
            k += 1

        lines: list[tuple[int, str]] = []
        row = 1
        for text in [title, *notes]:
            for piece in textwrap.wrap(text, _WRAP_AT) if text else ():
                lines.append((row, piece))
                row += 1
        row += 1
        anchors = []
        for i, (p, (w, h), part) in enumerate(zip(pics, sizes, media), start=1):
            if p.caption:
                lines.append((row, p.caption))
                row += 1
            anchors.append((row - 1, w, h, f"rId{i}", p.caption or p.path.name))
            row += -(-h // _ROW_PX) + 2

        wb_rels_part = _rels_part(wb_part)
        wb_rels = src.read(wb_rels_part).decode("utf-8")
        sheet_rid = _rel_id(wb_rels)
        new_parts = {
            sheet_part: _sheet_xml(lines),
            _rels_part(sheet_part): _add_relationship(None, "rId1", _T_DRAWING, _relative(sheet_part, drawing_part)),
            drawing_part: _drawing_xml(anchors),
        }
        drawing_rels = None
        for i, part in enumerate(media, start=1):
            drawing_rels = _add_relationship(drawing_rels, f"rId{i}", _T_IMAGE, _relative(drawing_part, part))
        new_parts[_rels_part(drawing_part)] = drawing_rels
        edits = {
            wb_part: _add_sheet_entry(src.read(wb_part).decode("utf-8"), name, sheet_rid),
            wb_rels_part: _add_relationship(wb_rels, sheet_rid, _T_WORKSHEET, _relative(wb_part, sheet_part)),
            "[Content_Types].xml": _add_content_types(
                src.read("[Content_Types].xml").decode("utf-8"), {sheet_part: _CT_WORKSHEET, drawing_part: _CT_DRAWING}),
        }
        with atomic_output(target) as tmp:
            with zipfile.ZipFile(tmp, "w", zipfile.ZIP_DEFLATED) as dst:
                for info in src.infolist():
                    data = src.read(info)
                    if info.filename in edits:
                        data = edits[info.filename].encode("utf-8")
                    dst.writestr(info, data, compress_type=info.compress_type)
                for part, xml in new_parts.items():
                    dst.writestr(part, xml.encode("utf-8"))
                for p, part in zip(pics, media):
                    dst.write(p.path, part, compress_type=zipfile.ZIP_STORED)
    return name
