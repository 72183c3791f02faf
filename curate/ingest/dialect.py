"""How a delimited text file is written: its encoding, delimiter, decimal mark and thousands
separator, detected from the bytes and overridable in the sidecar (``[dialect]``).

Labs export from spreadsheets set to their own locale: semicolon-separated files with decimal
commas (``1,25``), Latin-1 or UTF-16 text, thousands separators (``1.234,5`` / ``1,234.5``).
The encoding is found by charset-normalizer when the bytes are not UTF-8, the delimiter by
clevercsv's consistency measure (van den Burg, Nazábal & Sutton 2019, "Wrangling messy CSV
files by detecting row and type patterns", Data Min. Knowl. Disc. 33:1799), the decimal mark
and thousands separator by the shape of the cells that look like numbers. The result is kept
in the dataset's provenance.
"""

from __future__ import annotations

import contextlib
import re
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from curate.errors import InputError

__all__ = [
    "AmbiguousNumbers",
    "Dialect",
    "decode",
    "detect_delimiter",
    "detect_number_format",
    "numbers_as_written",
]

_SAMPLE_CHARACTERS = 64 * 1024  # what the delimiter is detected from
_ENCODINGS = ("cp1252", "latin_1", "iso8859_15", "cp1250", "mac_roman", "utf_16")
_DELIMITERS = (",", ";", "\t", "|")
_DECIMAL_COMMA = re.compile(r"^[+-]?(\d{1,3}(\.\d{3})+|\d+),\d+([eE][+-]?\d+)?$")
_DECIMAL_POINT = re.compile(r"^[+-]?(\d{1,3}(,\d{3})+|\d*)\.\d+([eE][+-]?\d+)?$")
_THOUSANDS_POINT = re.compile(r"^[+-]?\d{1,3}(\.\d{3})+(,\d+)?$")
_THOUSANDS_COMMA = re.compile(r"^[+-]?\d{1,3}(,\d{3})+(\.\d+)?$")


class AmbiguousNumbers(InputError):
    """The cells that look like numbers are written in two incompatible ways."""


@dataclass(frozen=True)
class Dialect:
    """How a text table is written (``detected`` names what was found rather than given)."""

    encoding: str = "utf-8"
    delimiter: str = ","
    decimal: str = "."
    thousands: str = ""
    detected: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Give the dialect as plain data (for the dataset's provenance and `inspect`)."""
        found = asdict(self)
        found["detected"] = list(self.detected)
        return found

    def describe(self) -> str:
        """Give the dialect in words: 'semicolon-separated, decimal comma, UTF-8'."""
        names = {",": "comma", ";": "semicolon", "\t": "tab", "|": "bar"}
        parts = [f"{names.get(self.delimiter, repr(self.delimiter))}-separated"]
        parts.append("decimal comma" if self.decimal == "," else "decimal point")
        if self.thousands:
            parts.append(f"thousands separator '{self.thousands}'")
        parts.append(self.encoding)
        return ", ".join(parts)


def decode(path: Path, raw: bytes, encoding: str | None) -> tuple[str, str, bool]:
    """Give the text, its encoding and whether the encoding was detected (not UTF-8 or given)."""
    if encoding is not None:
        try:
            return raw.decode(encoding), encoding, False
        except LookupError:
            raise InputError(f"{path}: unknown encoding '{encoding}' (dialect.encoding)") from None
        except UnicodeDecodeError as err:
            raise InputError(
                f"{path}: byte {err.start} is not {encoding} text (dialect.encoding)"
            ) from None
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        return raw.decode("utf-16"), "utf-16", True
    try:
        return raw.decode("utf-8-sig"), "utf-8", False
    except UnicodeDecodeError as err:
        start = err.start
    from charset_normalizer import from_bytes

    # the encodings lab computers write besides UTF-8: Windows and Mac Western/Central European
    best = from_bytes(raw[: 4 * _SAMPLE_CHARACTERS], cp_isolation=list(_ENCODINGS)).best()
    if best is None or best.encoding is None:
        raise InputError(
            f"{path}: byte {start} is not UTF-8 text and no other encoding fits; save the file "
            'as UTF-8 or name its encoding in the sidecar ([dialect] encoding = "latin-1")'
        )
    try:
        text = raw.decode(best.encoding)
        for preferred in ("cp1252", "latin_1"):  # the commonest, where it reads the same text
            with contextlib.suppress(UnicodeDecodeError):
                if raw.decode(preferred) == text:
                    return text, preferred.replace("_", "-"), True
        return text, best.encoding.replace("_", "-"), True
    except UnicodeDecodeError:
        raise InputError(
            f"{path}: byte {start} is not UTF-8 text; save the file as UTF-8 or name its "
            'encoding in the sidecar ([dialect] encoding = "latin-1")'
        ) from None


def detect_delimiter(text: str, default: str) -> tuple[str, bool]:
    """Give the delimiter (and whether it differs from the suffix's ``default``)."""
    sample = text[:_SAMPLE_CHARACTERS]
    first = sample.split("\n", 1)[0]
    if default == "\t" and "\t" in first:
        return "\t", False
    candidates = [d for d in _DELIMITERS if d in sample]
    if not candidates:
        return default, False
    if len(candidates) == 1:
        return candidates[0], candidates[0] != default
    import clevercsv

    try:
        found = clevercsv.Sniffer().sniff(sample, delimiters="".join(_DELIMITERS))
    except Exception:  # clevercsv gives up on some texts: keep the suffix's delimiter
        return default, False
    delimiter = getattr(found, "delimiter", None) or default
    if delimiter not in _DELIMITERS:
        return default, False
    return delimiter, delimiter != default


def detect_number_format(cells: list[str], delimiter: str) -> tuple[str, str]:
    """Give (decimal mark, thousands separator) from cells that look like numbers.

    A decimal comma is taken only where the delimiter is not a comma and no cell has a decimal
    point; a thousands separator only where every grouped cell agrees with it.
    """
    numeric = [c.strip() for c in cells if c.strip() and c.strip()[0] in "+-0123456789.,"]
    commas = sum(1 for c in numeric if _DECIMAL_COMMA.match(c))
    points = sum(1 for c in numeric if _DECIMAL_POINT.match(c))
    if delimiter != "," and commas and points:
        comma = next(c for c in numeric if _DECIMAL_COMMA.match(c))
        point = next(c for c in numeric if _DECIMAL_POINT.match(c))
        raise AmbiguousNumbers(
            f"the numbers are written two ways ('{comma}' with a decimal comma, '{point}' with a "
            "point, which may be a decimal point or a thousands separator); state them in the "
            'sidecar: [dialect] decimal = "," and thousands = "." (or decimal = ".")'
        )
    if delimiter != ",":
        _refuse_a_guess(numeric, "," if commas else ".")
    if delimiter != "," and commas and not points:
        grouped = [c for c in numeric if "." in c]
        thousands = "." if grouped and all(_THOUSANDS_POINT.match(c) for c in grouped) else ""
        return ",", thousands
    grouped = [c for c in numeric if "," in c]
    if delimiter != "," and grouped and all(_THOUSANDS_COMMA.match(c) for c in grouped):
        return ".", ","
    return ".", ""


_ONE_GROUP = re.compile(r"^[+-]?[1-9]\d{0,2}[.,]\d{3}$")


def _refuse_a_guess(numeric: list[str], mark: str) -> None:
    """Raise AmbiguousNumbers when every number with ``mark`` reads two ways ('1.500': 1.5, or
    1500 with a thousands separator) and no other number of the file tells which."""
    marked = [c for c in numeric if mark in c]
    if not marked or not all(_ONE_GROUP.match(c) for c in marked):
        return
    other = "." if mark == "," else ","
    if any(other in c for c in numeric):
        return  # '1.234,5' beside '1.500' says which mark is which
    example = marked[0]
    whole = example.replace(mark, "")
    fraction = example.replace(mark, ".")
    raise AmbiguousNumbers(
        f"'{example}' may be {float(fraction):g} ('{mark}' a decimal mark) or {int(whole)} (a "
        f"thousands separator), and no other number in the file tells which; state it: "
        f"--decimal '{mark}' or --thousands '{mark}' ([dialect] decimal = \"{mark}\" or "
        f'thousands = "{mark}" in the sidecar)'
    )


def numbers_as_written(cells: Any, decimal: str, thousands: str) -> Any:
    """Give text cells (a pandas Series of str) rewritten with a decimal point and no
    thousands separator, so that they parse as numbers."""
    if thousands:
        cells = cells.str.replace(thousands, "", regex=False)
    if decimal != ".":
        cells = cells.str.replace(decimal, ".", regex=False)
    return cells
