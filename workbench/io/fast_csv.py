"""A fast CSV encoder that writes the same bytes as pandas' writer, or declines.

:func:`workbench.io.atomic.write_csv` writes with ``DataFrame.to_csv(index=False,
float_format="%.10g", quoting=...)``. On a million rows most of that time is Python's
``"%.10g" % value`` for each float. This module builds the same text in chunks of rows with
three small compiled kernels (numba) and pyarrow's string kernels:

* floats (:func:`_classify`, :func:`_emit`): the ten significant digits come from one scaled
  product, rounded; a value whose scaled fraction lies too near a half (where the rounding
  could go either way) or whose decimal exponent is unsure is formatted by Python's own
  ``%`` instead (about 2 values in 10,000). The bound: the scaled value carries at most four
  roundings (two constants, two products: relative error below 5e-16, so below 5e-6 on a
  ten-digit integer), far inside the margin of 1e-4 kept from every half, so the integer
  kept is the correctly rounded one and a tie never passes the margin;
* ints, bools, nullable ints and bools, text (``str`` dtype, or object columns holding only
  ``str`` and missing values), quoted by the standard library's ``csv`` rules as pandas uses
  them (QUOTE_MINIMAL or QUOTE_NONNUMERIC, line end ``\\n``; the characters that make the
  csv module quote are asked of it at import);
* rows (:func:`_rows`): each row's cells joined by ``,`` and ended by ``\\n``.

Anything else (dates, categoricals, complex, object columns holding other objects, column
labels that are not text, no columns, text pyarrow cannot hold) is declined:
:func:`why_not` names the reason and the caller keeps pandas.
"""

from __future__ import annotations

import csv
import functools
import io
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

#: the format pandas is given; this encoder writes only this one
FLOAT_FORMAT = "%.10g"
#: a scaled value this near a half (or a decade's edge) is formatted by Python instead
_MARGIN = 1e-4
#: rows encoded at a time (bounded below by the bytes of one chunk, see _chunk_rows)
CHUNK_ROWS = 131_072
_CHUNK_BYTES = 256 * 2**20


def _quote_triggers() -> str:
    """The characters that make this Python's csv writer quote a field (line end ``\\n``).

    Asked of the csv module itself, so a Python that also quotes ``\\r`` is followed.
    """
    found = []
    for c in ",\"\n\r\t\x00 '":
        out = io.StringIO()
        csv.writer(out, lineterminator="\n").writerow([f"a{c}b", "x"])
        if out.getvalue().startswith('"'):
            found.append(c)
    return "".join(found)


QUOTE_TRIGGERS = _quote_triggers()
_TRIGGER_PATTERN = "[" + "".join("\\" + c if c in "\\]^-[" else c for c in QUOTE_TRIGGERS
                                 ).replace("\n", "\\n").replace("\r", "\\r") + "]"

# 10**p as a product of two doubles for every p a double's scaling can need
_P_LOW, _P_HIGH = -330, 345
_POW_A = np.ones(_P_HIGH - _P_LOW + 1)
_POW_B = np.empty(_P_HIGH - _P_LOW + 1)
for _p in range(_P_LOW, _P_HIGH + 1):
    if _p > 300:  # 10**p itself would overflow (or lose digits) for subnormal values
        _POW_A[_p - _P_LOW] = 1e30
        _POW_B[_p - _P_LOW] = float(f"1e{_p - 30}")
    else:
        _POW_B[_p - _P_LOW] = float(f"1e{_p}")  # correctly rounded by the parser
_TEN = 10 ** np.arange(19, dtype=np.int64)


# ----------------------------------------------------------------------------------- floats

DIGITS, EMPTY, ZERO, INFINITE, GIVEN = 0, 1, 2, 3, 4  # what _emit writes for a value


def _emit(q, e, neg, kind, given, given_offsets, quote):  # pragma: no cover - compiled
    """The text of ``%.10g`` of each value, as one byte buffer and its offsets.

    ``kind`` says what a value is written as: DIGITS (ten digits ``q``, 1e9 <= q < 1e10, and
    decimal exponent ``e``: value = q * 10**(e - 9)), EMPTY (NaN), ZERO, INFINITE (``neg``
    gives the sign), or GIVEN (the next text of ``given``, Python's own). ``quote`` puts
    ``"`` around each. C's rule for %g with precision 10: exponent form when e < -4 or
    e >= 10, trailing zeros (and a bare point) removed, the exponent signed and of at least
    two digits.
    """
    n = len(q)
    out = np.empty(n * 20 + len(given), dtype=np.uint8)
    offsets = np.empty(n + 1, dtype=np.int32)
    digits = np.empty(10, dtype=np.uint8)
    pos = 0
    g = 0
    offsets[0] = 0
    for i in range(n):
        if quote:
            out[pos] = 34
            pos += 1
        c = kind[i]
        if c == EMPTY:
            pass
        elif c == GIVEN:
            for k in range(given_offsets[g], given_offsets[g + 1]):
                out[pos] = given[k]
                pos += 1
            g += 1
        elif c == ZERO or c == INFINITE:
            if neg[i]:
                out[pos] = 45
                pos += 1
            if c == ZERO:
                out[pos] = 48
                pos += 1
            else:
                out[pos] = 105  # inf
                out[pos + 1] = 110
                out[pos + 2] = 102
                pos += 3
        else:
            if neg[i]:
                out[pos] = 45  # -
                pos += 1
            v = np.uint64(q[i])  # unsigned: division by ten without a sign correction
            for j in range(9, -1, -1):
                digits[j] = np.uint8(48 + v % np.uint64(10))
                v //= np.uint64(10)
            last = 9
            while last > 0 and digits[last] == 48:
                last -= 1
            x = e[i]
            if -4 <= x < 10:
                if x >= 0:
                    for j in range(x + 1):
                        out[pos] = digits[j]
                        pos += 1
                    if last > x:
                        out[pos] = 46  # .
                        pos += 1
                        for j in range(x + 1, last + 1):
                            out[pos] = digits[j]
                            pos += 1
                else:
                    out[pos] = 48
                    out[pos + 1] = 46
                    pos += 2
                    for _ in range(-x - 1):
                        out[pos] = 48
                        pos += 1
                    for j in range(last + 1):
                        out[pos] = digits[j]
                        pos += 1
            else:
                out[pos] = digits[0]
                pos += 1
                if last > 0:
                    out[pos] = 46
                    pos += 1
                    for j in range(1, last + 1):
                        out[pos] = digits[j]
                        pos += 1
                out[pos] = 101  # e
                out[pos + 1] = 45 if x < 0 else 43
                pos += 2
                a = -x if x < 0 else x
                if a >= 100:
                    out[pos] = 48 + a // 100
                    pos += 1
                out[pos] = 48 + (a // 10) % 10
                out[pos + 1] = 48 + a % 10
                pos += 2
        if quote:
            out[pos] = 34
            pos += 1
        offsets[i + 1] = pos
    return out[:pos], offsets


@functools.cache
def _emit_kernel():
    import numba

    return numba.njit(cache=True)(_emit)


def _classify(x, pow_a, pow_b, p_low, margin):  # pragma: no cover - compiled
    """Each value's kind for :func:`_emit`, and for DIGITS its ten correctly rounded digits
    ``q`` and decimal exponent ``e``.

    A finite non-zero value is scaled to s = |x| * 10**(9 - e), which must lie in
    [1e9 - 0.05, 1e10 - 0.5) (the range whose rounding keeps exponent e; log10 may miss the
    decade by one, so e moves until it does). q = rint(s) is the correctly rounded integer
    when s lies more than ``margin`` from a half: s carries at most four roundings (two
    constants, two products), a relative error below 5e-16, so below 5e-6 here. A value
    within the margin of a half or of the range's ends is GIVEN: Python's % formats it.
    """
    n = len(x)
    q = np.full(n, 1_000_000_000, dtype=np.int64)
    e = np.zeros(n, dtype=np.int64)
    kind = np.empty(n, dtype=np.int8)
    low = 1e9 - 0.05
    high = 1e10 - 0.5
    for i in range(n):
        v = x[i]
        if v != v:
            kind[i] = EMPTY
            continue
        a = abs(v)
        if a == 0.0:
            kind[i] = ZERO
            continue
        if a == np.inf:
            kind[i] = INFINITE
            continue
        ex = int(np.floor(np.log10(a)))
        k = 9 - ex - p_low
        s = a * pow_a[k] * pow_b[k]
        for _ in range(2):
            if s < low:
                ex -= 1
            elif s >= high:
                ex += 1
            else:
                break
            k = 9 - ex - p_low
            s = a * pow_a[k] * pow_b[k]
        r = np.rint(s)
        if (s < low + margin or s >= high - margin or not np.isfinite(s)
                or abs(s - r) > 0.5 - margin):
            kind[i] = GIVEN
            continue
        kind[i] = DIGITS
        q[i] = np.int64(r)
        e[i] = ex
    return q, e, kind


@functools.cache
def _classify_kernel():
    import numba

    return numba.njit(cache=True)(_classify)


def _digits(x: np.ndarray):
    """(q, e, kind) of :func:`_classify` for float64 values."""
    return _classify_kernel()(x, _POW_A, _POW_B, _P_LOW, _MARGIN)


def python_formatted(x: np.ndarray) -> np.ndarray:
    """Which values :func:`format_floats` leaves to Python's ``%``."""
    return _digits(np.asarray(x, dtype=np.float64))[2] == GIVEN


def format_floats(x: np.ndarray, quote: bool = False) -> pa.Array:
    """``"%.10g" % v`` for every value (NaN as an empty text), as a pyarrow string array;
    with ``quote``, each in ``"``."""
    x = np.asarray(x, dtype=np.float64)  # float32 and float16 widen exactly, as '%' does
    n = len(x)
    q, e, kind = _digits(x)
    given = [FLOAT_FORMAT % v for v in x[kind == GIVEN].tolist()]
    given = pa.array(given, pa.string())
    given_data, given_offsets = _parts(given) if len(given) else (
        np.zeros(1, np.uint8), np.zeros(1, np.int32))
    data, offsets = _emit_kernel()(q, e, np.signbit(x), kind, given_data,
                                   given_offsets.astype(np.int64), quote)
    return pa.StringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(data))


# ------------------------------------------------------------------------------ the columns

def _is_text_dtype(dtype) -> bool:
    return dtype.kind == "O" or str(dtype) in ("string", "str")


def _text_array(col: pd.Series) -> pa.Array | str:
    """The column's cells as a pyarrow string array (missing as null), or why not."""
    if isinstance(col.dtype, pd.StringDtype) and col.dtype.storage == "pyarrow":
        text = pa.array(col.array)  # the column's own buffers: str cells, missing as null
        if isinstance(text, pa.ChunkedArray):
            text = text.combine_chunks()
        return text
    values = col.to_numpy(dtype=object)
    kind = pd.api.types.infer_dtype(values, skipna=True)
    if kind not in ("string", "empty"):
        return f"text column holds {kind} values"
    missing = pd.isna(values)
    if missing.any():  # every missing cell is written as pandas' na_rep, ""
        values = values.copy()
        values[missing] = None
    try:
        return pa.array(values, type=pa.string(), from_pandas=True)
    except (pa.ArrowException, UnicodeError, TypeError, ValueError) as exc:
        return f"text pyarrow cannot hold ({type(exc).__name__})"


def _plan_column(col: pd.Series):
    """(kind, prepared values) for one column, or a reason string."""
    dtype = col.dtype
    if isinstance(dtype, pd.CategoricalDtype):
        return "categorical column"
    if _is_text_dtype(dtype):
        arr = _text_array(col)
        return arr if isinstance(arr, str) else ("text", arr)
    if isinstance(dtype, np.dtype):
        if dtype.kind == "f":
            return ("float", col.to_numpy())
        if dtype.kind in "iu":
            return ("int", col.to_numpy())
        if dtype.kind == "b":
            return ("bool", col.to_numpy())
        return f"dtype {dtype}"
    name = str(dtype)
    if isinstance(dtype, pd.Float64Dtype | pd.Float32Dtype):
        return ("float", col.to_numpy(dtype=np.float64, na_value=np.nan))
    if isinstance(dtype, pd.core.arrays.integer.IntegerDtype):
        return ("nullable-int", (col.isna().to_numpy(),
                                 col.to_numpy(dtype=dtype.numpy_dtype, na_value=0)))
    if isinstance(dtype, pd.BooleanDtype):
        return ("nullable-bool", (col.isna().to_numpy(),
                                  col.to_numpy(dtype=bool, na_value=False)))
    return f"dtype {name}"


class Plan:
    """A table this module can write: the prepared columns and the quoting."""

    def __init__(self, names: list[str], columns: list, quoting: int, rows: int):
        self.names, self.columns, self.quoting, self.rows = names, columns, quoting, rows

    def _cell_text(self, kind: str, values, lo: int, hi: int) -> pa.Array:
        """One column's cells of rows [lo, hi) exactly as the csv writer prints them."""
        nonnumeric = self.quoting == csv.QUOTE_NONNUMERIC
        if kind == "float":  # pandas hands the writer formatted text: quoted when nonnumeric
            return format_floats(values[lo:hi], quote=nonnumeric)
        if kind == "int":
            return pc.cast(pa.array(values[lo:hi]), pa.string())
        if kind == "bool":
            return pc.if_else(pa.array(values[lo:hi]), "True", "False")
        if kind in ("nullable-int", "nullable-bool"):
            missing, data = values[0][lo:hi], values[1][lo:hi]
            text = (pc.cast(pa.array(data), pa.string()) if kind == "nullable-int"
                    else pc.if_else(pa.array(data), "True", "False"))
            empty = '""' if nonnumeric else ""  # the missing cell is the text na_rep
            return pc.if_else(pa.array(missing), empty, text)
        if kind == "text":
            return self._quote_text(values.slice(lo, hi - lo))
        raise AssertionError(kind)

    def _quote_text(self, text: pa.Array) -> pa.Array:
        text = pc.fill_null(text.cast(pa.string()), "")  # a chunk holds < 2 GB (_chunk_rows)
        if self.quoting == csv.QUOTE_NONNUMERIC:
            return _wrap(pc.replace_substring(text, '"', '""'))
        need = pc.match_substring_regex(text, _TRIGGER_PATTERN)
        if not pc.any(need).as_py():
            return text
        quoted = _wrap(pc.replace_substring(text, '"', '""'))
        return pc.if_else(need, quoted, text)

    def _lines(self, cells: list[pa.Array]) -> np.ndarray:
        """The rows' bytes: cells joined by ``,``, each row ended by ``\\n``."""
        if len(cells) == 1 and self.quoting == csv.QUOTE_MINIMAL:
            # the csv writer quotes a record that is one empty field: '""'
            cells = [pc.if_else(pc.equal(cells[0], ""), '""', cells[0])]
        parts = [_parts(c) for c in cells]
        # 16 spare bytes after the data and the output: _rows copies short cells 16 at a time
        data = np.concatenate([d[o[0]:o[-1]] for d, o in parts] + [np.zeros(16, np.uint8)])
        offsets = np.empty((len(parts), len(cells[0]) + 1), dtype=np.int64)
        base = 0
        for j, (_, o) in enumerate(parts):
            offsets[j] = o
            offsets[j] += base - o[0]
            base += int(o[-1] - o[0])
        size = len(data) - 16 + len(cells) * len(cells[0])
        out = np.empty(size + 16, dtype=np.uint8)
        _rows_kernel()(out, data, offsets)
        return out[:size]

    def header(self) -> bytes:
        names = self._quote_text(pa.array(self.names, pa.string()))
        line = self._lines([names.slice(i, 1) for i in range(len(names))])
        return line.tobytes()

    def chunks(self) -> Iterator[np.ndarray | bytes]:
        yield self.header()
        step = _chunk_rows(self)
        for lo in range(0, self.rows, step):
            hi = min(lo + step, self.rows)
            cells = [self._cell_text(kind, values, lo, hi) for kind, values in self.columns]
            yield self._lines(cells)

    def write(self, path: Path) -> None:
        with open(path, "wb") as f:
            for chunk in self.chunks():
                f.write(chunk)

    def encode(self) -> bytes:
        return b"".join(memoryview(c) for c in self.chunks())


def _wrap(text: pa.Array) -> pa.Array:
    return pc.binary_join_element_wise('"', text, '"', "")


def _parts(text: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A string array's bytes and its len + 1 offsets into them, without copying."""
    if isinstance(text, pa.ChunkedArray):
        text = text.combine_chunks()
    if text.null_count:
        raise AssertionError("a cell without text")  # every kind fills its missing cells
    wide = pa.types.is_large_string(text.type) or pa.types.is_large_binary(text.type)
    buffers = text.buffers()
    offsets = np.frombuffer(buffers[1], dtype=np.int64 if wide else np.int32,
                            count=text.offset + len(text) + 1)[text.offset:]
    data = (np.frombuffer(buffers[2], dtype=np.uint8) if buffers[2] is not None
            else np.empty(0, dtype=np.uint8))
    return data, offsets


def _rows(out, data, offsets):  # pragma: no cover - compiled
    """Row by row, each column's cell (bytes ``data[offsets[j, i]:offsets[j, i + 1]]``)
    followed by ``,``, the last by ``\\n``, into ``out``.

    A cell of up to 16 bytes is copied as 16 (a fixed-length copy the compiler unrolls): the
    bytes past its end are overwritten by what follows, and both buffers have 16 to spare.
    """
    columns, rows = offsets.shape[0], offsets.shape[1] - 1
    pos = 0
    for i in range(rows):
        for j in range(columns):
            a = offsets[j, i]
            size = offsets[j, i + 1] - a
            if size <= 16:
                for k in range(16):
                    out[pos + k] = data[a + k]
            else:
                for k in range(size):
                    out[pos + k] = data[a + k]
            pos += size
            out[pos] = 10 if j == columns - 1 else 44
            pos += 1


@functools.cache
def _rows_kernel():
    import numba

    return numba.njit(cache=True)(_rows)


def _chunk_rows(plan: Plan) -> int:
    width = 2
    for kind, values in plan.columns:
        if kind == "text":
            longest = pc.max(pc.binary_length(values)).as_py() or 0
            width += 2 * longest + 3
        else:
            width += 28
    return max(1, min(CHUNK_ROWS, _CHUNK_BYTES // width))


def why_not(table: pd.DataFrame, quoting: int) -> str | None:
    """Why this table is left to pandas (``None``: :func:`plan` can write it)."""
    got = _plan(table, quoting)
    return got if isinstance(got, str) else None


def plan(table: pd.DataFrame, quoting: int) -> Plan | None:
    """A :class:`Plan` that writes ``table.to_csv(index=False, float_format="%.10g",
    quoting=quoting)``'s bytes, or ``None`` where this module does not handle the table."""
    got = _plan(table, quoting)
    return None if isinstance(got, str) else got


def _plan(table: pd.DataFrame, quoting: int) -> Plan | str:
    if quoting not in (csv.QUOTE_MINIMAL, csv.QUOTE_NONNUMERIC):
        return f"quoting {quoting}"
    if table.shape[1] == 0:
        return "no columns"
    if isinstance(table.columns, pd.MultiIndex):
        return "column labels on several levels"
    names = list(table.columns)
    if not all(isinstance(c, str) for c in names):
        return "a column label that is not text"
    columns = []
    for i, name in enumerate(names):
        got = _plan_column(table.iloc[:, i])
        if isinstance(got, str):
            return f"column {name!r}: {got}"
        columns.append(got)
    try:
        pa.array(names, pa.string())
    except (pa.ArrowException, UnicodeError) as exc:
        return f"a column label pyarrow cannot hold ({type(exc).__name__})"
    return Plan([str(c) for c in names], columns, quoting, len(table))
