"""The shape of a CSV file's text: is it text at all, does every line have as many fields as
the header, and the units row under the header.

Checked before values are parsed (:mod:`modemap.data.tables` calls these), because the
parser alone lets two mistakes through: with only some columns asked for, a row with an
extra field (often an unquoted decimal comma splitting a number in two) is read with its
values shifted, and a short row reads as empty cells.  Lines are counted as a text editor
numbers them (header = row 1); blank lines are allowed and counted.
"""

from __future__ import annotations

import csv
import gzip
import io
import re
from typing import IO, Any

import numpy as np

from modemap._exceptions import DataError

__all__ = [
    "check_fields",
    "check_text",
    "fields_error",
    "head_field_counts",
    "open_bytes",
    "parse_header",
    "with_units",
]

Table = Any  # modemap.data.tables.Table (which imports this module)

_HEADER = re.compile(r"^\s*(?P<name>.*?)\s*\[(?P<unit>[^\[\]]*)\]\s*$")


def parse_header(header: str) -> tuple[str, str]:
    """Split a column header ``"name [unit]"`` into ``(name, unit)``.

    Parameters
    ----------
    header : str
        Header text.  Without a bracketed unit the unit is ``""``.

    Returns
    -------
    name, unit : str
        Both stripped of surrounding blanks.

    Examples
    --------
    >>> parse_header("T [degC]")
    ('T', 'degC')
    >>> parse_header("flow")
    ('flow', '')
    """
    match = _HEADER.match(header)
    if match and match.group("name"):
        return match.group("name"), match.group("unit").strip()
    return header.strip(), ""


def open_bytes(table: Table) -> IO[bytes]:
    """The raw bytes of a CSV file (decompressed for ``.csv.gz``), as a binary file object."""
    if str(table.path).lower().endswith(".gz"):
        return gzip.open(table.path, "rb")
    return open(table.path, "rb")


_BLOCK_BYTES = 16 * 1024**2
_NEWLINE, _RETURN, _QUOTE = 10, 13, ord('"')
_TEXT_CONTROLS = (9, 10, 12, 13)  # tab, line feed, form feed, carriage return


def check_text(table: Table, probe: bytes, more: bool, control_share: float) -> None:
    """Refuse a file whose first block ``probe`` is not text (``more``: the file goes on).

    Raises
    ------
    DataError
        Empty file, UTF-16/32 text, a NUL byte, too many control characters, or a first
        line longer than the block.
    """
    if not probe:
        raise table.error("the file is empty")
    if probe.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise table.error("UTF-16 or UTF-32 text is not read; save the file as UTF-8")
    nul = probe.find(b"\0")
    if nul >= 0:
        raise DataError(
            f"not a text file (a NUL byte at byte {nul}; binary data?)",
            source=table.label,
            row=probe.count(b"\n", 0, nul) + 1,
        )
    codes = np.frombuffer(probe, dtype=np.uint8)
    controls = int(np.count_nonzero((codes < 32) & ~np.isin(codes, _TEXT_CONTROLS)))
    if controls > control_share * codes.size:
        raise table.error(
            f"not a text file ({controls} control characters in its first {codes.size} bytes)"
        )
    if more and b"\n" not in probe and b"\r" not in probe:
        raise table.error(f"no line end in the first {codes.size} bytes; not a table of text")


def fields_error(table: Table, line: int, seen: int, expected: int) -> DataError:
    """The one-line error for line ``line`` having ``seen`` fields instead of ``expected``."""
    headers = table.headers
    fmt = table.fmt
    if seen > expected:
        last = f" (the last column is '{headers[-1]}')" if headers else ""
        hint = ""
        if fmt.delimiter == fmt.decimal or (fmt.delimiter == "," and fmt.decimal == "."):
            hint = "; an extra field, or an unquoted decimal comma splitting a number?"
        message = f"{seen} fields where the header has {expected}{last}{hint}"
        return DataError(message, source=table.label, row=line)
    column = headers[seen] if seen < len(headers) else None
    return DataError(
        f"{seen} field{'s' if seen != 1 else ''} where the header has {expected}",
        source=table.label,
        column=column,
        row=line,
    )


def check_fields(table: Table) -> None:
    """Refuse the first line (after the header) whose number of fields differs from the header's.

    Unquoted files are scanned in blocks with numpy; a file with quote characters is read
    with the :mod:`csv` module, which knows quoted delimiters and line ends.
    """
    expected = len(table.headers)
    with open_bytes(table) as fh:
        line, carry = 1, b""
        while True:
            block = fh.read(_BLOCK_BYTES)
            data = carry + block
            if _QUOTE in data:
                return _check_quoted(table, expected)
            end = len(data) if not block else data.rfind(b"\n") + 1
            if end > 0:
                _check_block(table, data[:end], line, expected)
                line += data.count(b"\n", 0, end)
            carry = data[end:]
            if not block:
                return None


def _check_block(table: Table, data: bytes, first_line: int, expected: int) -> None:
    """Fields per line of ``data`` (whole lines, the first being ``first_line``)."""
    if not data:
        return
    nul = data.find(b"\0")
    if nul >= 0:
        row = first_line + data.count(b"\n", 0, nul)
        raise DataError("not a text file (a NUL byte in this row)", source=table.label, row=row)
    codes = np.frombuffer(data, dtype=np.uint8)
    tokens = np.flatnonzero((codes == ord(table.fmt.delimiter)) | (codes == _NEWLINE))
    is_end = codes[tokens] == _NEWLINE
    ends, line_ends = tokens[is_end], np.flatnonzero(is_end)
    if ends.size == 0 or ends[-1] != codes.size - 1:  # the last line has no line end
        ends, line_ends = np.append(ends, codes.size), np.append(line_ends, tokens.size)
    fields = np.diff(line_ends, prepend=-1)  # delimiters between line ends, plus one
    bad = fields != expected
    if not bad.any():
        return
    # blank lines (nothing, or a carriage return, between line ends) are allowed
    starts = np.concatenate(([0], ends[:-1] + 1))
    length = ends - starts
    last = codes[np.clip(ends - 1, 0, codes.size - 1)]
    bad &= length - (length > 0) * (last == _RETURN) > 0
    if bad.any():
        k = int(np.argmax(bad))
        raise fields_error(table, first_line + k, int(fields[k]), expected)


def _check_quoted(table: Table, expected: int) -> None:
    with open_bytes(table) as raw:
        text = io.TextIOWrapper(raw, encoding=table.encoding, errors="replace", newline="")
        reader = csv.reader(text, delimiter=table.fmt.delimiter)
        line = 1
        for record in reader:
            if record and len(record) != expected:
                raise fields_error(table, line, len(record), expected)
            line = reader.line_num + 1


def head_field_counts(table: Table, lines: int) -> list[int]:
    """Fields on each of the first ``lines`` lines (quotes respected)."""
    with open_bytes(table) as raw:
        text = io.TextIOWrapper(raw, encoding=table.encoding, errors="replace", newline="")
        reader = csv.reader(text, delimiter=table.fmt.delimiter)
        return [len(record) for record, _ in zip(reader, range(lines), strict=False)]


def with_units(table: Table, headers: list[str], units: list[str]) -> list[str]:
    """Headers with the units row folded in as ``name [unit]``.

    A unit may be written bare (``m``) or in brackets (``[m]``); an empty cell means no unit.
    A header that already carries a unit must agree with the units row.

    Raises
    ------
    DataError
        A units row with another number of fields than the header, one that holds numbers
        (data, not units), or a unit that contradicts the header's.
    """
    counts = head_field_counts(table, 2)
    if len(counts) > 1 and counts[1] != counts[0]:
        raise DataError(
            f"the units row has {counts[1]} fields where the header has {counts[0]}",
            source=table.label,
            row=2,
        )
    units = [u.strip() for u in units]
    units = [u[1:-1].strip() if u.startswith("[") and u.endswith("]") else u for u in units]
    given = [u for u in units if u]
    if given and all(_is_number(u, table.fmt.decimal) for u in given):
        raise DataError(
            f"the units row holds numbers (such as '{given[0]}'), not units; "
            "is there a units row in this file?",
            source=table.label,
            row=2,
        )
    out = []
    for header, unit in zip(headers, units, strict=True):
        name, own = parse_header(header)
        if "[" in unit or "]" in unit:
            raise DataError(f"unit {unit!r} has a bracket inside", source=table.label,
                            column=name, row=2)  # fmt: skip
        if own and unit and own != unit:
            raise DataError(
                f"the header says [{own}] but the units row says '{unit}'",
                source=table.label,
                column=name,
                row=2,
            )
        out.append(f"{name} [{unit}]" if unit and not own else header)
    return out


def _is_number(text: str, decimal: str) -> bool:
    try:
        float(text.replace(decimal, "."))
    except ValueError:
        return False
    return True
