#!/usr/bin/env python3
"""Writes the input-profile fixtures of tests/profiles.rs, each the way a station writes it.

Run from anywhere: python3 tests/data/profiles/make_fixtures.py
Needs XlsxWriter (pip install xlsxwriter; written with 3.3.1) and odfpy (pip install odfpy;
written with 1.4.1) for the OpenDocument sheet. Output is deterministic:
workbooks get a fixed creation date, text files are encoded by Python's codecs.

Invented suppliers: alder-cells, birchworks, cedar-energy. Local times are Europe/Berlin.
"""
import csv
import datetime as dt
import io
import os
import zipfile

import xlsxwriter
from odf.opendocument import OpenDocumentSpreadsheet
from odf.table import Table, TableCell, TableRow
from odf.text import P

HERE = os.path.dirname(os.path.abspath(__file__))


def write(name, data):
    with open(os.path.join(HERE, name), "wb") as f:
        f.write(data)


def csv_text(rows, delimiter):
    out = io.StringIO()
    w = csv.writer(out, delimiter=delimiter, lineterminator="\r\n")
    w.writerows(rows)
    return out.getvalue()


def comma(x):
    return f"{x:.1f}".replace(".", ",")


# 1. birchworks: a spreadsheet's CSV in a German locale: ';', decimal commas, two title
#    lines, day-first local times across the spring clock change (29 March 2026, 02:00-03:00
#    does not exist in Europe/Berlin), an operator column to ignore. Header on line 3.
def birchworks(bad):
    rows = [["Messprotokoll Wareneingang"], ["Station 3"]]
    rows.append(["Supplier", "Batch No.", "Serial", "Date", "Capacity [mAh]", "Mass [g]", "Operator"])
    times = ["28.03.2026 23:50", "29.03.2026 01:59", "29.03.2026 03:00", "29.03.2026 03:01"]
    for i, t in enumerate(times):
        cap = comma(3010 + i * 0.5)
        if bad and i == 2:
            cap = "3.012,5"  # a thousands separator: refused
        rows.append(["birchworks", "BW-0007", f"S{i + 1:03}", t, cap, comma(45.1 + i / 10), "jk"])
    if bad:
        rows.append(["birchworks", "BW-0007", "S005", "29.03.2026 02:30", "3011,0", "45,0", "jk"])
    return csv_text(rows, ";").encode("utf-8")


# 2. alder-cells: "Unicode text" from a spreadsheet: UTF-16LE with a byte-order mark, tab
#    separated, long layout with the station's own column names.
def alder_unicode(bad):
    rows = [["Lieferant", "Merkmal", "Charge", "Messwert", "Zeitpunkt", "Zelle"]]
    for i in range(6):
        ch = "Kapazität" if i % 2 == 0 else "Innenwiderstand"
        value = f"{3000 + i:.1f}" if i % 2 == 0 else f"{18.5 + i / 10:.2f}"
        if bad and i == 3:
            value = "n/a"
        rows.append(["alder-cells", ch, "AC-100", value, f"2026-03-02 08:{i:02}:00", f"Z{i // 2 + 1}"])
    return csv_text(rows, "\t").encode("utf-16")  # BOM + native (little-endian) order


# 3. cedar-energy: windows-1252 (ANSI) export, ',' separated, wide layout, local times
#    around the autumn clock change (25 October 2026, 02:00-03:00 happens twice).
def cedar(bad):
    rows = [["source", "lot", "unit", "sampled_at", "Kapazität [mAh]", "Dicke [mm]"]]
    times = ["2026-10-25 01:30", "2026-10-25 03:30", "2026-10-25T04:00:00+01:00"]
    if bad:
        times[1] = "2026-10-25 02:30"  # ambiguous: refused
    for i, t in enumerate(times):
        rows.append(["cedar-energy", "CE-7", f"C{i + 1}", t, f"{2990 + i}.0", f"5.{i}"])
    return csv_text(rows, ",").encode("cp1252")


# 4. Workbooks: sheet "Messwerte" after an "Info" sheet, a title row, header on row 3,
#    numeric batch numbers, date cells with times, a formula with its cached value.
def workbook(name, date_1904=False, bad=False):
    wb = xlsxwriter.Workbook(os.path.join(HERE, name), {"date_1904": date_1904})
    wb.set_properties({"created": dt.datetime(2026, 3, 1, 12, 0, 0)})
    info = wb.add_worksheet("Info")
    info.write("A1", "alder-cells incoming inspection")
    ws = wb.add_worksheet("Messwerte")
    date_fmt = wb.add_format({"num_format": "yyyy-mm-dd hh:mm"})
    ws.write("A1", "Prüfprotokoll")
    ws.write_row("A3", ["Batch No.", "Serial", "Capacity [mAh]", "Mass [g]", "Date"])
    for i in range(16):
        r = 3 + i  # 0-based: spreadsheet rows 4..19
        ws.write_number(r, 0, 4711 + i // 8)
        ws.write_string(r, 1, f"AL{i + 1:03}")
        cap = 3005.5 + (i % 8) * 0.25
        if bad and r + 1 == 17:
            ws.write_string(r, 2, "n/a")
        else:
            ws.write_number(r, 2, cap)
        # A formula whose cached value (written by XlsxWriter) is what must be read.
        ws.write_formula(r, 3, f"=C{r + 1}/100+15", None, round(cap / 100 + 15, 6))
        ws.write_datetime(r, 4, dt.datetime(2026, 3, 2 + i // 8, 8, 30 + i % 8), date_fmt)
    wb.close()


# 4b. birchworks: a workbook in our own column names (no profile needed), the table right of
#     and below A1 with an empty spacer column, date cells without a time (dates).
def offset_workbook(name):
    wb = xlsxwriter.Workbook(os.path.join(HERE, name))
    wb.set_properties({"created": dt.datetime(2026, 3, 1, 12, 0, 0)})
    ws = wb.add_worksheet()
    date_fmt = wb.add_format({"num_format": "yyyy-mm-dd"})
    ws.write_row("C3", ["source", "lot", None, "sampled_at", "capacity_mah"])
    for i in range(3):
        r = 3 + i
        ws.write_string(r, 2, "birchworks")
        ws.write_string(r, 3, "BW-0011")
        ws.write_datetime(r, 5, dt.datetime(2026, 3, 5), date_fmt)
        ws.write_number(r, 6, 3001 + i)
    wb.close()


# 5. cedar-energy: an OpenDocument sheet (long layout, our column names): float cells, date
#    cells as the format stores them (ISO text), a text cell where a number belongs when bad.
def ods(name, bad=False):
    doc = OpenDocumentSpreadsheet()
    table = Table(name="Pruefung")

    def row(cells):
        tr = TableRow()
        for c in cells:
            if isinstance(c, float):
                cell = TableCell(valuetype="float", value=c)
                cell.addElement(P(text=str(c)))
            elif isinstance(c, dt.datetime):
                cell = TableCell(valuetype="date", datevalue=c.strftime("%Y-%m-%dT%H:%M:%S"))
                cell.addElement(P(text=c.strftime("%d.%m.%Y %H:%M")))
            else:
                cell = TableCell(valuetype="string")
                cell.addElement(P(text=c))
            tr.addElement(cell)
        table.addElement(tr)

    row(["source", "characteristic", "lot", "value", "sampled_at", "unit"])
    for i in range(4):
        value = "tbd" if bad and i == 2 else 2990.0 + i
        row(["cedar-energy", "capacity_mah", "CE-9", value, dt.datetime(2026, 7, 1, 9, i), f"C{i}"])
    doc.spreadsheet.addElement(table)
    path = os.path.join(HERE, name)
    doc.save(path)
    fix_zip_times(path)


def fix_zip_times(path):
    """odfpy stamps the zip entries with the time of writing: fixed here, so the file is
    the same on every run."""
    with zipfile.ZipFile(path) as z:
        entries = [(i, z.read(i.filename)) for i in z.infolist()]
    with zipfile.ZipFile(path, "w") as z:
        for info, data in entries:
            fixed = zipfile.ZipInfo(info.filename, date_time=(2026, 3, 1, 12, 0, 0))
            fixed.compress_type = info.compress_type
            fixed.external_attr = info.external_attr
            z.writestr(fixed, data)


write("birchworks_2026-03-29.csv", birchworks(False))
write("birchworks_2026-03-29_bad.csv", birchworks(True))
write("alder_unicode.txt", alder_unicode(False))
write("alder_unicode_bad.txt", alder_unicode(True))
write("cedar_ansi.csv", cedar(False))
write("cedar_ansi_bad.csv", cedar(True))
workbook("alder_cells.xlsx")
workbook("alder_cells_1904.xlsx", date_1904=True)
workbook("alder_cells_bad.xlsx", bad=True)
offset_workbook("birchworks_offset.xlsx")
ods("cedar_sheet.ods")
ods("cedar_sheet_bad.ods", bad=True)
