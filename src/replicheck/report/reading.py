"""The "what was read" section: how the table was found in the file, in words.

One function turns the report dictionary's ``input`` part into labelled lines
that every format shows, so that a reviewer can check the reading (sheet,
rows skipped, units, columns filled down) before trusting the verdict.
"""

from __future__ import annotations

from typing import Any

from replicheck.advice import option

_SHOWN_TEXT = 60


def _quoted(texts: list[str]) -> str:
    first = texts[0] if len(texts[0]) <= _SHOWN_TEXT else texts[0][: _SHOWN_TEXT - 3] + "..."
    more = f" and {len(texts) - 1} more" if len(texts) > 1 else ""
    return f"'{first}'{more}"


def _rows(n: int) -> str:
    return f"{n:,} row" + ("" if n == 1 else "s")


def reading_lines(inp: dict[str, Any]) -> list[tuple[str, str]]:
    """``(label, text)`` lines saying what was read from the input.

    >>> inp = {"source": "s2.csv", "format": "csv", "encoding": "utf-8", "delimiter": ",",
    ...        "sheet": None, "n_rows": 12, "n_rows_used": 12,
    ...        "layout": {"header_row": 4, "header_rows": 1, "units_row": 5, "first_row": 6,
    ...                   "last_row": 17, "range": None, "skipped_above": ["Table S2"],
    ...                   "skipped_below": [], "units": {"length": "(mm)"}, "stated": [],
    ...                   "empty_rows": 0, "filled_down": []}}
    >>> for label, text in reading_lines(inp): print(f"{label}: {text}")
    file: s2.csv (csv, utf-8, comma-delimited)
    header: row 4; skipped above it: 1 row ('Table S2')
    units: row 5 (length (mm)), not read as data
    data: rows 6 to 17
    rows: 12 read, 12 analysed
    """
    lay = inp.get("layout") or {}
    lines: list[tuple[str, str]] = []
    fmt = inp.get("format")
    parts = [p for p in (fmt, inp.get("encoding"), _delimiter(inp.get("delimiter"))) if p]
    where = f"{inp['source']} ({', '.join(parts)})" if parts else str(inp["source"])
    if inp.get("sheet") is not None:
        where += f", sheet '{inp['sheet']}'"
    stacked = lay.get("sheets") or []
    if stacked:
        where += (
            f", sheets {', '.join(repr(str(x)) for x in stacked)} stacked (each row's sheet in "
            f"column '{lay.get('sheet_column')}')"
        )
    skipped_sheets = lay.get("skipped_sheets") or []
    if skipped_sheets:
        where += f"; sheets not read: {', '.join(repr(str(x)) for x in skipped_sheets)}"
    if lay.get("range"):
        stated = " (stated)" if "range" in lay.get("stated", []) else ""
        where += f", cells {lay['range']}{stated}"
    lines.append(("file", where))
    if lay.get("header_row") is not None:
        header = f"row {lay['header_row']}"
        if lay.get("header_rows", 1) == 2:
            header = (
                f"rows {lay['header_row'] - 1} and {lay['header_row']} (group headings "
                "joined to the names below them)"
            )
        if "header row" in lay.get("stated", []):
            header += " (stated)"
        above = lay.get("skipped_above") or []
        if above:
            header += f"; skipped above it: {_rows(len(above))} ({_quoted(above)})"
        lines.append(("header", header))
        if lay.get("units_row") is not None:
            units = ", ".join(f"{col} {unit}" for col, unit in lay.get("units", {}).items())
            lines.append(("units", f"row {lay['units_row']} ({units}), not read as data"))
        first, last = lay.get("first_row"), lay.get("last_row")
        data = f"rows {first} to {last}" if last is not None else f"row {first} to the end"
        below = lay.get("skipped_below") or []
        if below:
            data += f"; notes below skipped: {_rows(len(below))} ({_quoted(below)})"
        lines.append(("data", data))
    tables = lay.get("tables") or []
    if tables:
        lines.append(
            (
                "side by side",
                f"{len(tables)} tables with the same columns ("
                + ", ".join(repr(str(t)) for t in tables)
                + f") stacked, each row's table in column '{lay.get('table_column')}'",
            )
        )
    beside = lay.get("skipped_tables") or []
    if beside:
        lines.append(
            (
                "side by side",
                "the first table was read; not read: "
                + "; ".join(str(t) for t in beside)
                + f" (state {option('range')} to read another)",
            )
        )
    filled = lay.get("filled_down") or []
    if filled:
        items = ", ".join(
            f"'{f['column']}' ({f['cells']:,} cells, {f['blocks']:,} blocks"
            + (", stated" if f["stated"] else "")
            + (", from merged cells" if f.get("merged") else "")
            + ")"
            for f in filled
        )
        lines.append(
            (
                "filled down",
                f"{items}: each empty cell took the value above it, as for a label written "
                f"once per block (turn off with {option('fill-down', False)}; name columns with "
                f"{option('fill-down')})",
            )
        )
    for r in lay.get("reshaped") or []:
        shown = ", ".join(f"'{c}'" for c in r["columns"][:4])
        if len(r["columns"]) > 4:
            shown += f", ... ({len(r['columns'])} columns)"
        values = " and ".join(f"'{v}'" for v in r["values"])
        holder = f"'{r['key']}' holds the {r['levels']} column labels"
        if r.get("group"):
            holder = f"'{r['group']}' holds the group headings and {holder}"
        text = (
            f"wide columns {shown} turned into long form: {holder}, {values} the values; "
            f"{_rows(r['rows_before'])} became {r['rows_after']:,}"
        )
        if r["row_column"]:
            text += (
                f"; '{r['row_column']}' numbers the wide rows (each one subject measured "
                "at each time)"
            )
        text += (
            " (stated)"
            if r["stated"]
            else f" (found because the response is not a column; state the columns with "
            f"{option('long')})"
        )
        lines.append(("reshaped", text))
    rows = f"{inp['n_rows']:,} read, {inp['n_rows_used']:,} analysed"
    if lay.get("empty_rows"):
        rows += f"; {_rows(lay['empty_rows'])} with no values dropped"
    lines.append(("rows", rows))
    return lines


def _delimiter(delimiter: str | None) -> str | None:
    names = {",": "comma", ";": "semicolon", "\t": "tab", "|": "bar"}
    if delimiter is None:
        return None
    return f"{names.get(delimiter, repr(delimiter))}-delimited"
