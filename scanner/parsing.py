"""Messy columns: numbers stored as text, declared missing codes, yes/no flags and dates.

Administrative extracts rarely arrive clean.  Each rule here either parses a value the one way
it can be read, or refuses the column with a message naming the column, an example value and
the fix.  Nothing is guessed where two readings are possible:

* text numbers: surrounding blanks are ignored and ``1,234`` / ``1,234.5`` (comma thousands
  separators in groups of three) are read as numbers; ``1,5`` (decimal comma?) and any other text
  (``72+``, ``<5``) are refused unless declared missing;
* the cells ``""``, ``NA``, ``N/A``, ``NaN``, ``NULL``, ``None`` and ``.`` are missing;
* yes/no text (``Y``/``N``, ``yes``/``no``, ``true``/``false``, ``T``/``F``, any case) is 1/0;
* declared missing codes (``[data] missing = [999, -1]`` for every scanned column, and
  ``[data.missing_by_column]`` per column) become missing before anything else, text or number;
* dates: ISO ``2021-03-31`` (optionally with a time), ``2021/03/31``, ``20210331``,
  ``31.03.2021``, ``31-Mar-2021`` / ``31mar2021``, and day-month-year or month-day-year with ``/``
  or ``-``.  The day/month order of the last kind is read from the data (a first field above 12
  means day first, a second field above 12 means month first); when no value settles it, or the
  column holds both orders, the column is refused and ``data.date_format`` fixes it.
"""
from __future__ import annotations

import re

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import InputError

NULL_TOKENS = ("", "na", "n/a", "nan", "null", "none", ".")
TRUE_TOKENS = ("y", "yes", "true", "t")
FALSE_TOKENS = ("n", "no", "false", "f")
_THOUSANDS = r"^[+-]?\d{1,3}(,\d{3})+(\.\d*)?$"


def _examples(values, k: int = 3) -> str:
    shown = [repr(v) for v in list(dict.fromkeys(values))[:k]]
    return ", ".join(shown) + (", ..." if len(set(values)) > k else "")


def _is_text(t) -> bool:
    return pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t)


def split_codes(codes) -> tuple[set, set]:
    """Declared missing codes as (text codes, numeric codes); a numeric code also matches its text."""
    text, nums = set(), set()
    for c in codes or ():
        if isinstance(c, bool):
            continue
        if isinstance(c, (int, float)):
            nums.add(float(c))
            text.add(f"{c:g}" if isinstance(c, float) else str(c))
        else:
            text.add(str(c).strip())
    return text, nums


_DEC_COMMA = r"^[+-]?(\d{1,3}(\.\d{3})+|\d*),\d+$"      # 4,8  -0,25  1.234,5
_DEC_DOT = r"^[+-]?\d*\.\d+$"                               # 4.8  .25
_WORDLIKE_MISSING = ("unknown", "unk", "missing", "not known", "nk", "not recorded", "nr",
                     "not done", "nd", "refused", "?", "-", "--", "n.a.", "not available")


class NumberReader:
    """How one table's text cells become numbers; remembers each column's decimal mark.

    ``decimal`` is the spec's ``data.decimal``: ``","``, ``"."`` or None (detect per column).
    Detection: a cell such as ``4,8`` or ``1.234,5`` (a comma that cannot be a thousands
    separator) sets the column to decimal commas, unless the column also holds ``4.8``-style
    decimals, which is refused.  A column read with thousands separators (``1,234``) in earlier
    rows that shows a decimal comma later is refused too: the earlier rows were read the other
    way.  ``comma_cells`` counts the cells read with a decimal comma, per column.
    """

    def __init__(self, decimal: str | None = None, source: str = ""):
        self.decimal, self.source = decimal, source
        self.mode: dict[str, str] = {}
        self.thousands: dict[str, str] = {}          # column -> first cell read as thousands
        self.comma_cells: dict[str, int] = {}
        self.example: dict[str, str] = {}             # column -> one cell read with a comma

    def decide(self, column: str, s: pa.Array, role: str) -> str:
        """The decimal mark of ``column`` given one batch of trimmed present cells."""
        if self.decimal:
            return self.decimal
        if column in self.mode:
            return self.mode[column]
        comma = pc.fill_null(pc.match_substring_regex(s, _DEC_COMMA), False)
        thousands = pc.fill_null(pc.match_substring_regex(s, _THOUSANDS), False)
        evidence = pc.and_(comma, pc.invert(thousands))
        if not pc.any(evidence).as_py():
            if pc.any(thousands).as_py() and column not in self.thousands:
                self.thousands[column] = pc.filter(s, thousands)[0].as_py()
            return "."
        example = pc.filter(s, evidence)[0].as_py()
        dots = pc.fill_null(pc.match_substring_regex(s, _DEC_DOT), False)
        if pc.any(dots).as_py():
            raise InputError(
                f"{self.source}: {role} column '{column}' mixes decimal points and decimal commas "
                f"({pc.filter(s, dots)[0].as_py()!r} and {example!r}); set [data] decimal = \",\" "
                "or decimal = \".\" in the spec to say which one the file uses.")
        if column in self.thousands:
            raise InputError(
                f"{self.source}: {role} column '{column}' was read with thousands separators "
                f"({self.thousands[column]!r}) in earlier rows but holds {example!r}, a decimal "
                "comma, further down; set [data] decimal = \",\" (or \".\") in the spec.")
        self.mode[column] = ","
        return ","


def _bad_text_advice(bad: list, column: str, decimal: str) -> str:
    """The fix for cells that are not numbers; real values are never offered as missing codes."""
    uniq = list(dict.fromkeys(str(b) for b in bad))
    comma = [b for b in uniq if re.match(_DEC_COMMA, b) or re.match(r"^[+-]?[\d.,]+$", b)]
    missing_like = [b for b in uniq if b.strip().lower() in _WORDLIKE_MISSING]
    numberish = [b for b in uniq if b not in comma and re.search(r"\d", b)]
    words = [b for b in uniq if b not in comma and b not in missing_like and b not in numberish]
    tips = []
    if comma:
        tips.append(f"{comma[0]!r} looks like a number with a decimal comma: set [data] decimal = "
                    f"\",\" in the spec" if decimal != "," else
                    f"{comma[0]!r} is not a number even with decimal commas: fix those cells")
    if words:
        pairs = ", ".join(f"{_toml_key(w)} = {1 - i}" for i, w in enumerate(words[:2]))
        tips.append(f"text categories such as {words[0]!r} are values, not missing: map them to "
                    f"numbers with [data.value_map] {column} = {{{pairs}}}")
    if numberish:
        tips.append(f"annotated numbers such as {numberish[0]!r} are values, not missing: fix "
                    f"those cells, or map them with [data.value_map] {column} = "
                    f"{{{_toml_key(numberish[0])} = <number>}}")
    if missing_like:
        tips.append(f"if {missing_like[0]!r} means 'not recorded', declare it missing: "
                    f"[data.missing_by_column] {column} = [{missing_like[0]!r}]")
    return "; ".join(tips)


def _toml_key(text: str) -> str:
    return text if re.match(r"^[A-Za-z0-9_-]+$", text) else '"' + text.replace('"', '\\"') + '"'


def text_to_numbers(arr: pa.Array, column: str, source: str, role: str, codes=(),
                    reader: NumberReader | None = None, count: bool = True) -> np.ndarray:
    """Parse a text column as float64 or refuse it (see module docstring for the rules).

    ``count`` False parses without adding to ``reader.comma_cells`` (a second parse of the same
    cells, to tell which a declared code made missing, must not count them again)."""
    text_codes, num_codes = split_codes(codes)
    s = pc.utf8_trim_whitespace(arr.cast(pa.string()))
    low = pc.utf8_lower(s)
    missing = pc.fill_null(pc.is_in(low, value_set=pa.array(NULL_TOKENS)), True)
    if text_codes:
        missing = pc.or_(missing, pc.fill_null(pc.is_in(s, value_set=pa.array(sorted(text_codes))), False))
    present = pc.invert(missing)
    words = pc.filter(low, present)
    out = np.full(len(arr), np.nan)
    if len(words) == 0:
        return out
    uniq = set(pc.unique(words).to_pylist())
    if uniq <= set(TRUE_TOKENS + FALSE_TOKENS + ("0", "1")) and uniq - {"0", "1"}:
        one = pc.is_in(low, value_set=pa.array(TRUE_TOKENS + ("1",))).to_numpy(zero_copy_only=False)
        vals = one.astype(float)
    else:
        reader = reader or NumberReader(source=source)
        shown = pc.filter(s, present)
        mark = reader.decide(column, shown, role)
        if mark == ",":
            is_comma = pc.fill_null(pc.match_substring_regex(s, _DEC_COMMA), False)
            hits = int(pc.sum(pc.and_(is_comma, present)).as_py() or 0) if count else 0
            reader.comma_cells[column] = reader.comma_cells.get(column, 0) + hits
            if hits and column not in reader.example:
                reader.example[column] = pc.filter(s, pc.and_(is_comma, present))[0].as_py()
            cleaned = pc.if_else(is_comma, pc.replace_substring(
                pc.replace_substring(s, ".", ""), ",", "."), s)
        else:
            commas = pc.fill_null(pc.match_substring_regex(s, _THOUSANDS), False)
            cleaned = pc.if_else(commas, pc.replace_substring(s, ",", ""), s)
        ok_mask = present.to_numpy(zero_copy_only=False)
        vals = np.full(len(arr), np.nan)
        try:
            got = pc.cast(pc.filter(cleaned, present), pa.float64())
            vals[ok_mask] = got.to_numpy(zero_copy_only=False)
            bad = []
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raw = cleaned.to_numpy(zero_copy_only=False)
            bad = []
            for i in np.flatnonzero(ok_mask):
                try:
                    vals[i] = float(raw[i])
                except (TypeError, ValueError):
                    bad.append(raw[i])
                    if len(bad) > 50:
                        break
        if bad:
            raise InputError(
                f"{source}: {role} column '{column}' holds text that is not a number "
                f"({_examples(bad)}); {role} columns must be numeric — "
                f"{_bad_text_advice(bad, column, mark)}.")
    if num_codes:
        vals[np.isin(vals, list(num_codes))] = np.nan
    keep = present.to_numpy(zero_copy_only=False)
    out[keep] = vals[keep]
    return out


def apply_value_map(arr: pa.Array, mapping: dict, column: str, source: str) -> tuple[np.ndarray, int]:
    """Cells of ``arr`` replaced by the numbers of ``mapping`` (keys: cell text, any case).

    Numeric cells are looked up by their shortest text (``1.0`` → ``"1"``).  Missing cells stay
    missing; a present cell with no entry is refused with the fix.  Returns the values and the
    number of cells mapped.
    """
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if _is_text(arr.type):
        cells = pc.utf8_trim_whitespace(arr.cast(pa.string())).to_pylist()
    elif pa.types.is_boolean(arr.type):
        cells = [None if v is None else ("1" if v else "0") for v in arr.to_pylist()]
    else:
        cells = [None if v is None or v != v else (f"{v:g}" if isinstance(v, float) else str(v))
                 for v in arr.to_pylist()]
    table = {str(k).strip().lower(): float(v) for k, v in mapping.items()}
    out = np.full(len(cells), np.nan)
    unmapped, hits = [], 0
    for i, c in enumerate(cells):
        if c is None or c.lower() in NULL_TOKENS:
            continue
        v = table.get(c.lower())
        if v is None:
            unmapped.append(c)
            continue
        out[i] = v
        hits += 1
    if unmapped:
        raise InputError(
            f"{source}: column '{column}' holds {_examples(unmapped)}, which data.value_map "
            f"does not list (it maps {', '.join(map(repr, mapping))}); add an entry for each "
            f"value, e.g. [data.value_map] {column} = {{{_toml_key(unmapped[0])} = <number>, ...}}.")
    return out, hits


def drop_codes(values: np.ndarray, codes) -> np.ndarray:
    """Numeric values with the declared numeric missing codes set to NaN (a copy)."""
    _, nums = split_codes(codes)
    if not nums:
        return values
    out = values.copy()
    out[np.isin(out, list(nums))] = np.nan
    return out


# ---------------------------------------------------------------------- dates
_DATE_KINDS = (
    ("iso", r"^\d{4}-\d{1,2}-\d{1,2}([ T]\d{1,2}:\d{2}(:\d{2}(\.\d+)?)?)?(Z|[+-]\d{2}:?\d{2})?$", None),
    ("ymd_slash", r"^\d{4}/\d{1,2}/\d{1,2}$", "%Y/%m/%d"),
    ("ymd_compact", r"^\d{8}$", "%Y%m%d"),
    ("dmy_dot", r"^\d{1,2}\.\d{1,2}\.\d{4}$", "%d.%m.%Y"),
    ("d_mon_y", r"^\d{1,2}[- ]?[A-Za-z]{3}[- ]?\d{4}$", None),
    ("two_way", r"^\d{1,2}[/-]\d{1,2}[/-]\d{4}$", None),
)


class DateParser:
    """Turns text dates into numpy datetime64[ns]; remembers the day/month order once settled.

    One parser is used for a whole table, so two batches can never be read in different orders.
    """

    def __init__(self, column: str, source: str, date_format: str | None = None):
        self.column, self.source, self.format = column, source, date_format
        self.order: str | None = None            # "dmy" or "mdy" for the two-way kind

    def _fail(self, example) -> InputError:
        return InputError(
            f"{self.source}: date column '{self.column}' holds {example!r}, which is not a date "
            "cutscan can read; use ISO dates (2021-03-31), set data.date_format (e.g. "
            "'%d/%m/%Y'), or leave the cell empty.")

    def parse(self, arr: pa.Array) -> np.ndarray:
        import pandas as pd
        s = pd.Series(pc.utf8_trim_whitespace(arr.cast(pa.string())).to_pylist(), dtype=object)
        empty = s.isna() | s.str.lower().isin(NULL_TOKENS)
        out = pd.Series(pd.NaT, index=s.index, dtype="datetime64[ns]")
        todo = ~empty
        if self.format:
            got = pd.to_datetime(s[todo], format=self.format, errors="coerce")
            out[todo] = got
            self._check(s, todo & out.isna())
            return out.to_numpy()
        for kind, pattern, fmt in _DATE_KINDS:
            sel = todo & s.str.match(pattern).fillna(False)
            if not sel.any():
                continue
            part = s[sel]
            if kind == "iso":
                got = pd.to_datetime(part.str.replace(r"(Z|[+-]\d{2}:?\d{2})$", "", regex=True),
                                     format="ISO8601", errors="coerce")
            elif kind == "d_mon_y":
                got = pd.to_datetime(part.str.replace(r"[- ]", "", regex=True), format="%d%b%Y",
                                     errors="coerce")
            elif kind == "two_way":
                got = pd.to_datetime(part.str.replace("-", "/"), format=self._two_way(part),
                                     errors="coerce")
            else:
                got = pd.to_datetime(part, format=fmt, errors="coerce")
            out[sel] = got
            todo = todo & ~sel
        self._check(s, todo | (~empty & out.isna()))
        return out.to_numpy()

    def _check(self, s, bad) -> None:
        if bad.any():
            raise self._fail(s[bad].iloc[0])

    def _two_way(self, part) -> str:
        fields = part.str.split(r"[/-]", regex=True)
        a = fields.str[0].astype(int)
        b = fields.str[1].astype(int)
        day_first, month_first = bool((a > 12).any()), bool((b > 12).any())
        if day_first and month_first:
            raise InputError(
                f"{self.source}: date column '{self.column}' mixes day-first and month-first "
                f"dates (e.g. {part[a > 12].iloc[0]!r} and {part[b > 12].iloc[0]!r}); "
                "convert the column to ISO dates (2021-03-31).")
        order = "dmy" if day_first else "mdy" if month_first else None
        if order and self.order and order != self.order:
            raise InputError(
                f"{self.source}: date column '{self.column}' reads as {self.order} in earlier rows "
                f"but as {order} at {part.iloc[0]!r}; convert the column to ISO dates.")
        self.order = self.order or order
        if self.order is None:
            raise InputError(
                f"{self.source}: date column '{self.column}' holds dates such as {part.iloc[0]!r} "
                "where day and month cannot be told apart; set data.date_format = '%d/%m/%Y' "
                "(day first) or '%m/%d/%Y' (month first) in the spec.")
        return "%d/%m/%Y" if self.order == "dmy" else "%m/%d/%Y"


def integer_dates(arr: pa.Array, column: str, source: str) -> np.ndarray:
    """Integer dates written as yyyymmdd (20210331) → datetime64; anything else is refused."""
    import pandas as pd
    v = arr.to_numpy(zero_copy_only=False).astype(float)
    ok = ~np.isnan(v)
    if ok.any() and ((v[ok] >= 1000_01_01) & (v[ok] <= 2999_12_31)).all():
        got = pd.to_datetime(pd.Series(v).astype("Int64").astype(str), format="%Y%m%d", errors="coerce")
        bad = ok & got.isna().to_numpy()
        if not bad.any():
            return got.to_numpy()
        example = int(v[bad][0])
    else:
        example = int(v[ok][0]) if ok.any() else None
    raise InputError(f"{source}: date column '{column}' holds numbers (e.g. {example}) that are "
                     "not yyyymmdd dates; store the column as dates or ISO text (2021-03-31).")


def _integral(arr: pa.Array) -> bool:
    """True when a float column holds whole numbers only (CSV integers are read as float64)."""
    v = arr.to_numpy(zero_copy_only=False)
    v = v[~np.isnan(v)]
    return bool(v.size) and bool(np.all(v == np.floor(v)))


def to_timestamps(arr: pa.Array, column: str, source: str, parser: DateParser | None = None) -> pa.Array:
    """A date column of any supported kind as a pyarrow timestamp array (missing stays null)."""
    t = arr.type
    if pa.types.is_dictionary(t):
        arr = arr.dictionary_decode()
        t = arr.type
    if pa.types.is_timestamp(t) or pa.types.is_date(t) or pa.types.is_null(t):
        return arr
    if _is_text(t):
        vals = (parser or DateParser(column, source)).parse(arr)
    elif pa.types.is_integer(t) or (pa.types.is_floating(t) and _integral(arr)):
        vals = integer_dates(arr, column, source)
    else:
        raise InputError(f"{source}: date column '{column}' has type {t}; it must hold dates "
                         "(a date type, ISO text such as 2021-03-31, or yyyymmdd numbers).")
    return pa.array(vals, type=pa.timestamp("ns"), from_pandas=True)


def check_not_temporal(t, column: str, source: str, role: str) -> None:
    """Dates, times and durations are not numbers: refuse them as scanned columns."""
    if pa.types.is_temporal(t):
        raise InputError(f"{source}: {role} column '{column}' holds dates or times ({t}); "
                         f"{role} columns must be numeric — derive a number from it first "
                         "(for example age in days), or name it as data.date.")


_CSV_COLUMN = re.compile(r"In CSV column #(\d+): (?:Row #(\d+): )?CSV conversion error to "
                         r"(\w+): invalid value '([^']*)'")
_KIND = {"double": "numbers", "int64": "whole numbers", "bool": "true/false",
         "timestamp": "timestamps"}


def csv_conversion_message(exc: Exception, path, columns: list[str]) -> str | None:
    """A clear message for pyarrow's 'CSV conversion error' (column type guessed from early rows)."""
    m = _CSV_COLUMN.search(str(exc))
    if not m:
        return None
    i, row, typ, value = int(m.group(1)), m.group(2), m.group(3), m.group(4)
    name = columns[i] if i < len(columns) else f"#{i}"
    where = f"at line {row}" if row else "further down"
    advice = _bad_text_advice([value], name, ".")
    return (f"{path}: column '{name}' holds {_KIND.get(typ, typ)} in the first rows but {value!r} "
            f"{where}; fix that cell" + (f", or: {advice}." if advice else "."))
