"""Reading and validating the input tables: interaction logs and feature tables.

CSV or parquet is chosen by the file extension. Every problem is reported as one TowersError line
naming the file, the column and (where it applies) the row, plus the fix.
"""

from __future__ import annotations

import contextlib
import difflib
import re
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from towers.data.spill import Column, Spill
from towers.errors import TowersError, plain, where
from towers.memory import trim_freed_memory

READABLE = (".csv", ".parquet", ".pq", ".tsv")


def read_table(path: str | Path, columns: list[str] | None = None, watch: list[str] | None = None,
               ids: tuple[str, ...] | list[str] = (), empty_ok: bool = False) -> pd.DataFrame:
    """Read a CSV (or TSV) or parquet file into a DataFrame, with clear errors.

    CSV handling: a UTF-8 byte-order mark, quoted delimiters and Windows line ends are read correctly.
    watch: the columns whose words for missing get a warning (_missing_words; default: `columns`, else all).
    ids: id columns, read as written (ids_as_written): 0007 stays 0007. empty_ok: a header without rows is a
    table of no rows (a night with no new items), not an error.
    """
    path = Path(path)
    suffix = check_file(path)
    with _read_errors(path, suffix):
        if suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq

            schema_names = pq.read_schema(path).names
            if columns is not None:
                require_columns(schema_names, columns, path)
            df = _plain_frame(pq.read_table(path, columns=columns).to_pandas())
        else:
            # only empty cells are missing as read; words pandas would also take as missing are looked at next
            df = pd.read_csv(path, sep="\t" if suffix == ".tsv" else ",", encoding="utf-8-sig",
                             skipinitialspace=False, low_memory=False, keep_default_na=False, na_values=[""],
                             dtype=dict.fromkeys(ids, str))
            _check_fields(df, path)
            _missing_words(df, path, watch if watch is not None else columns)
            ids_as_written(df, ids)
    _check_header(df, path)
    if columns is not None:
        require_columns(df.columns, columns, path)
    if len(df) == 0 and not empty_ok:
        raise TowersError(f"{path}: the table has a header but no rows; export the data rows too")
    return df


def table_columns(path: str | Path) -> list[str]:
    """A table's column names, read from its header alone (the parquet schema, the CSV's first line), with
    read_table's checks and messages."""
    path = Path(path)
    suffix = check_file(path)
    with _read_errors(path, suffix):
        if suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq

            return [str(c).strip() for c in pq.read_schema(path).names]
        df = pd.read_csv(path, sep="\t" if suffix == ".tsv" else ",", encoding="utf-8-sig", nrows=0)
    _check_header(df, path)
    return list(df.columns)


def _not_utf8(path: Path, exc: UnicodeDecodeError) -> TowersError:
    """The error for a CSV that does not decode: binary data under a text name (parquet, a spreadsheet) is
    named as such; text in another encoding gets its line and the fix."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096)
    except OSError:
        head = b""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):  # the byte-order marks of UTF-16 (a spreadsheet's "Unicode Text")
        return TowersError(f"{path}: is UTF-16 text; save it as CSV UTF-8 (or parquet) and try again")
    if head.startswith(b"PAR1"):
        return TowersError(f"{path}: holds parquet data under a {path.suffix} name; rename it to .parquet")
    if head.startswith(b"PK") or b"\x00" in head:
        return TowersError(f"{path}: is not a text file (a spreadsheet workbook or other binary file?); export the "
                           "table as CSV (UTF-8) or parquet")
    line = _line_of_byte(path)
    at = f"line {line}" if line else f"byte {exc.start}"
    return TowersError(f"{path}: {at} is not UTF-8 text (byte 0x{exc.object[exc.start]:02x}); save the file as "
                       "UTF-8 (a spreadsheet's 'CSV UTF-8' format) and try again")


def _line_of_byte(path: Path) -> int | None:
    """The line (from 1) of the first byte of a file that is not UTF-8, found by decoding it a megabyte at a
    time (the offset a reader reports may count from the start of its current chunk); None if none is found."""
    import codecs

    decoder, lines, chunk_size = codecs.getincrementaldecoder("utf-8")(), 1, 1 << 20
    try:
        with open(path, "rb") as fh:
            while chunk := fh.read(chunk_size):
                try:
                    decoder.decode(chunk)
                except UnicodeDecodeError as exc:
                    return lines + chunk.count(b"\n", 0, max(0, exc.start))
                lines += chunk.count(b"\n")
    except OSError:
        return None
    return None


def _first_line(path: Path) -> str:
    """A text table's header line as written ("" when it cannot be read)."""
    try:
        with open(path, encoding="utf-8-sig", errors="replace") as fh:
            return fh.readline().rstrip("\r\n")
    except OSError:
        return ""


@contextlib.contextmanager
def _read_errors(path: Path, suffix: str):
    """Reading errors of pandas and pyarrow as one-line TowersErrors naming the file."""
    try:
        yield
    except TowersError:
        raise
    except pd.errors.EmptyDataError:
        raise TowersError(f"{path}: the file is empty; it needs a header row and at least one data row") from None
    except UnicodeDecodeError as exc:
        raise _not_utf8(path, exc) from None
    except (pd.errors.ParserError, ValueError, OSError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        # rows longer than a header without the file's own separator: most often a file saved with another one
        line = _first_line(path) if isinstance(exc, pd.errors.ParserError) else ""
        hint = None if ("\t" if suffix == ".tsv" else ",") in line else separator_hint([line])
        raise TowersError(f"{path}: cannot be read as {suffix[1:]} ({first}); "
                          + (hint or f"check the file is a valid {suffix[1:]} table")) from None
    except Exception as exc:  # pyarrow raises its own ArrowInvalid family
        _raise_if_arrow(exc, path)
        raise


# what pandas reads as missing by default besides an empty cell (its STR_NA_VALUES, pandas 2)
MISSING_WORDS = frozenset({"#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN",
                           "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null"})


def _plain_whole(digits: int) -> str:
    """A regex of a whole number as it prints, of at most `digits` digits: no sign but minus, no leading zero,
    no -0 (so 07 and 0007 are never taken for 7)."""
    return rf"0|-?[1-9]\d{{0,{digits - 1}}}"


PLAIN_WHOLE = _plain_whole(19)  # int64's longest: parsed exactly by _exact_whole
DIGITS = r"[+-]?\d+"  # any whole number written in digits, plain or not
_WHOLE_NUMBER = f"^(?:{_plain_whole(18)})$"  # what a CSV id column may hold to be read as numbers: arrow's cast of
# 18 digits cannot overflow int64; a 19-digit column stays text and align_id_types matches it exactly


def ids_as_written(df: pd.DataFrame, ids) -> None:
    """Id columns read from CSV as text become whole numbers, in place, only when every id is written as one
    prints (17, not 0017): a code with leading zeros (an SKU 0007, an ISBN) keeps its zeros, and 07 and 0007
    stay two ids rather than both becoming 7. Checked and cast by arrow's kernels: this runs on every piece
    of a CSV log (pandas' to_numeric on text took 0.3 s a million ids, the arrow cast 0.01 s)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    for name in ids:
        if name not in df.columns:
            continue
        column = df[name]
        text = pa.array(column, type=pa.string(), from_pandas=True)  # missing cells as nulls
        whole = pc.match_substring_regex(text, _WHOLE_NUMBER)
        if len(text) > text.null_count and pc.all(whole, skip_nulls=True).as_py():
            numbers = pc.cast(text, pa.int64())
            # a missing id stays missing (a float NaN, as pandas reads it) for normalise_ids to name its row
            df[name] = numbers.to_numpy(zero_copy_only=False) if numbers.null_count == 0 else \
                numbers.to_pandas().astype("float64")
        else:
            df[name] = column.astype(object)


def _missing_words(df: pd.DataFrame, path: Path, watch: list[str] | None) -> None:
    """Cells holding a word for missing (NA, null, n/a, ...) become missing, in place, as pandas takes them by
    default. A column whose other cells are all numbers is then read as numbers, as usual. In a column of text
    the word may be a value (region NA for North America), so that column gets a warning naming it."""
    for name in df.columns:
        column = df[name]
        if not (column.dtype == object or pd.api.types.is_string_dtype(column.dtype)):
            continue
        words = column.isin(MISSING_WORDS).to_numpy()
        if not words.any():
            continue
        row = int(np.flatnonzero(words)[0])
        word = column.iloc[row]
        column = column.mask(words)
        numbers = pd.to_numeric(column, errors="coerce")
        if int(numbers.notna().sum()) == int(column.notna().sum()):  # every other cell a number
            df[name] = numbers
            continue
        df[name] = column
        if watch is not None and str(name).strip() not in watch:
            continue
        warnings.warn(f"{where(path, shown(str(name).strip()), row + 1)}: {int(words.sum())} cells hold {word!r} or "
                      "another word for missing and are taken as missing; if it is a value here (NA for North "
                      "America, say), write it another way", stacklevel=4)


def _check_fields(df: pd.DataFrame, path: Path) -> None:
    """pandas silently takes the first field as an index when the rows have more fields than the header,
    shifting every column one place; refuse rather than read the wrong values."""
    if not isinstance(df.index, pd.RangeIndex):
        raise TowersError(f"{where(path, row=1)}: the data rows have more fields than the header row "
                          f"({len(df.columns)} names); add the missing column names or remove trailing delimiters")


def _check_header(df: pd.DataFrame, path: Path) -> None:
    """Column names stripped of spaces, each named once."""
    df.columns = [str(c).strip() for c in df.columns]
    repeated = df.columns[df.columns.duplicated()]
    if len(repeated):
        raise TowersError(f"{where(path, shown(repeated[0]))}: the header names this column twice; rename one of them")


def check_file(path: Path) -> str:
    """The table's suffix, after checking that it is an existing file of a readable format."""
    if not path.exists():
        raise TowersError(f"{path}: file not found; check the path (relative paths start at the config file's folder "
                          "in a config, at the current folder on the command line)")
    if path.is_dir():
        raise TowersError(f"{path}: is a folder, not a table; give a .csv, .tsv, .parquet or .pq file")
    suffix = path.suffix.lower()
    if suffix not in READABLE:
        raise TowersError(f"{path}: unsupported format '{suffix or '(none)'}'; save the table as .csv, .tsv, .parquet or .pq")
    return suffix


def _plain_frame(df: pd.DataFrame) -> pd.DataFrame:
    """A frame read from parquet with a plain 0..n-1 index."""
    # a frame saved with its id as the index (df.set_index("id").to_parquet()): the id is a column here
    named = [n for n in df.index.names if n is not None]
    if named:
        df = df.reset_index(level=named)
    if not isinstance(df.index, pd.RangeIndex):
        df = df.reset_index(drop=True)
    return df


def _raise_if_arrow(exc: Exception, path: Path) -> None:
    if type(exc).__module__.startswith("pyarrow"):
        first = str(exc).strip().splitlines()[0]
        raise TowersError(f"{path}: cannot be read as parquet ({first}); re-export the table") from None


def read_table_chunks(path: str | Path, columns: list[str], rows: int, take=None, ids: tuple[str, ...] | list[str] = ()):
    """Yield (first row, DataFrame of `columns`) pieces of a table, `rows` rows at a time.

    Only one piece is in memory at a time: parquet is read one batch at a time and CSV through pandas'
    chunked reader (each piece's types inferred on its own rows). The checks and messages are
    read_table's; an empty table yields nothing (a CSV with a header and no rows is an error, as in
    read_table). take: called once for each unit of the file in order (a parquet row group, whose
    batches are then all read or none is; a CSV piece, which pandas parses either way), it says whether
    to yield that unit's pieces; the first rows count every unit (a data-parallel process's share).
    """
    path = Path(path)
    suffix = check_file(path)
    take = take or (lambda: True)
    if suffix in (".parquet", ".pq"):
        yield from _parquet_pieces(path, suffix, columns, rows, take)
    else:
        yield from _csv_pieces(path, suffix, columns, rows, take, ids)


def _parquet_pieces(path: Path, suffix: str, columns: list[str], rows: int, take):
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(path)
        require_columns(parquet.schema_arrow.names, columns, path)
        # one reader a row group: a single reader over the whole file keeps what it read in arrow's pool
        # (0.29 GiB after 30M events of scripts/bench's scale log), so memory would grow with the file
        group_rows = [parquet.metadata.row_group(g).num_rows for g in range(parquet.metadata.num_row_groups)]

        def batches():  # (first row in the file, batch) of the row groups taken
            before = 0
            for group, n in enumerate(group_rows):
                if take():
                    for batch in parquet.iter_batches(batch_size=rows, row_groups=[group], columns=columns):
                        yield before, batch
                        before += batch.num_rows
                else:
                    before += n
        pieces = batches()
    except TowersError:
        raise
    except (ValueError, OSError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise TowersError(f"{path}: cannot be read as {suffix[1:]} ({first}); "
                          f"check the file is a valid {suffix[1:]} table") from None
    except Exception as exc:
        _raise_if_arrow(exc, path)
        raise
    while True:
        try:
            piece = next(pieces, None)
        except Exception as exc:
            _raise_if_arrow(exc, path)
            raise
        if piece is None:
            return
        start, batch = piece
        df = _plain_frame(batch.to_pandas())
        df.columns = [str(c).strip() for c in df.columns]
        yield start, df[[str(c).strip() for c in columns]]


def _csv_pieces(path: Path, suffix: str, columns: list[str], rows: int, take, ids=()):
    start = 0
    with _read_errors(path, suffix), pd.read_csv(path, sep="\t" if suffix == ".tsv" else ",", encoding="utf-8-sig",
                                                 skipinitialspace=False, chunksize=rows,
                                                 dtype=dict.fromkeys(ids, str)) as reader:
        for df in reader:  # the reader is closed however the loop ends, a caller's error included
            _check_fields(df, path)
            if start == 0:
                _check_header(df, path)
                require_columns(df.columns, columns, path)
            else:
                df.columns = [str(c).strip() for c in df.columns]
            df = df[columns].reset_index(drop=True)
            ids_as_written(df, ids)
            if take():
                yield start, df
            start += len(df)
    if start == 0:
        raise TowersError(f"{path}: the table has a header but no rows; export the data rows too")


def table_files(path: str | Path) -> list[Path]:
    """The files of a table given as one file or as a folder of files (read in name order).

    A folder lets a shop drop one export a day beside the others; hidden files and files of other
    kinds (a _SUCCESS marker, say) are skipped, and its files must all be CSV/TSV or all parquet.
    """
    path = Path(path)
    if not path.is_dir():
        check_file(path)
        return [path]
    files = sorted(f for f in path.iterdir()
                   if f.is_file() and not f.name.startswith((".", "_")) and f.suffix.lower() in READABLE)
    if not files:
        nested = sorted(d.name for d in path.iterdir() if d.is_dir() and not d.name.startswith((".", "_")))
        hint = (f"; its subfolders ({', '.join(nested[:3])}{', ...' if len(nested) > 3 else ''}) are not read: move "
                "their files into one folder" if nested else "")
        raise TowersError(f"{path}: the folder holds no .csv, .tsv, .parquet or .pq files{hint}; put the log's files "
                          "there or give one file")
    kinds = {f.suffix.lower() in (".parquet", ".pq") for f in files}
    if len(kinds) > 1:
        raise TowersError(f"{path}: the folder mixes parquet and CSV files; convert them to one format")
    return files


def release_read_buffers() -> None:
    """Hand the memory freed after reading a long table in pieces back to the system.

    Arrow keeps the pieces' buffers in its own pool, which numpy cannot reuse; glibc's malloc keeps
    freed pieces of a few MB in its heap, where later arrays of a long log's length do not fit (they
    are mapped on their own). Both would stay resident for the whole run: 0.17 GiB of 0.77 after
    reading 10M events (scripts/bench's scale log).
    """
    import pyarrow as pa

    pa.default_memory_pool().release_unused()
    trim_freed_memory()


class IdPieces:
    """A long id column read in pieces, each piece's codes turned into codes of the whole column at once.

    The result equals factorize_ids on the whole column: codes plus distinct ids in order of first
    appearance. Kept between pieces: int32 codes (in a spill file with a spill, data/spill.py) and one
    entry per distinct id seen so far, never one Python object per row nor a piece's distinct ids again.
    Pieces of different types (numbers in one file, text in another) are merged as text.

    The distinct ids sit in two indexes: `settled` and the ids added since (`recent`); recent joins
    settled once it is as long, so each id is hashed again only about log2(pieces) times, not once a piece.
    """

    def __init__(self, spill: Spill | None = None):
        self.codes = Column(spill or Spill(), np.int32)
        self.settled = self.recent = None  # _Ids each, once the first piece is in

    def add(self, series: pd.Series, path, column, keep=None) -> np.ndarray | None:
        """One piece: all its distinct ids are numbered, the codes of its `keep` rows kept (default all).

        keep: a bool mask over the piece's rows, or a function of the piece's (codes, distinct ids) giving
        one (a data-parallel process's own users, data/shards.py). Returns the mask used.
        """
        codes, uniques = self.factorize(series, path, column)
        if callable(keep):
            keep = keep(codes, uniques)
        if keep is not None:
            codes = codes[keep]
        if self.settled is None:
            self.settled, self.recent = _Ids(uniques), _Ids(uniques[:0])
            self.codes.add(codes)
            return keep
        if (uniques.dtype == object) != (self.settled.ids.dtype == object):  # numbers beside text: all as text
            self.settled, self.recent = self.settled.as_text(), self.recent.as_text()
            uniques = uniques.astype(str).astype(object)
        at = self.settled.positions(uniques)
        missing = np.flatnonzero(at < 0)
        if len(missing) and len(self.recent.ids):
            later = self.recent.positions(uniques[missing])
            found = later >= 0
            at[missing[found]] = len(self.settled.ids) + later[found]
            missing = missing[~found]
        if len(missing):  # new ids, numbered on in their order of first appearance within the piece
            at[missing] = len(self.settled.ids) + len(self.recent.ids) + np.arange(len(missing))
            self.recent = _Ids(np.concatenate([self.recent.ids, uniques[missing]]))
            if len(self.recent.ids) >= len(self.settled.ids):
                self.settled = _Ids(np.concatenate([self.settled.ids, self.recent.ids]))
                self.recent = _Ids(self.recent.ids[:0])
            if len(self.settled.ids) + len(self.recent.ids) >= 2 ** 31:
                raise TowersError(f"{where(path, column)}: more than 2**31 distinct values; no id table could hold "
                                  "them (hash them into fewer ids first)")
        self.codes.add(at.astype(np.int32)[codes])
        return keep

    def factorize(self, series: pd.Series, path, column) -> tuple[np.ndarray, np.ndarray]:
        """One piece as (codes, distinct values in order of first appearance), checked; ids by default."""
        return factorize_ids(series, path, column)

    def finish(self) -> tuple[np.ndarray, np.ndarray]:
        """(codes, distinct ids): int32 codes, half the memory of int64 a row (a spill array with a spill)."""
        codes = self.codes.finish()
        if self.settled is None:
            return codes, np.zeros(0, np.int64)
        uniques = np.concatenate([self.settled.ids, self.recent.ids])
        self.settled = self.recent = None
        return codes, np.asarray(uniques, dtype=object if uniques.dtype == object else np.int64)


class _Ids:
    """Distinct ids (int64 or str objects) and their hash index, built once."""

    def __init__(self, ids: np.ndarray):
        self.ids = ids
        self._index = None

    def positions(self, values: np.ndarray) -> np.ndarray:
        if self._index is None:
            self._index = pd.Index(self.ids, dtype=self.ids.dtype)  # dtype given: pandas would infer str
        return self._index.get_indexer(values)

    def as_text(self) -> "_Ids":
        return _Ids(self.ids.astype(str).astype(object))


def shown(name: str) -> str:
    """A column name fit for a one-line message: line breaks and other control characters escaped."""
    return name if name.isprintable() else repr(name)[1:-1]


def separator_hint(header: list[str], column: str | None = None) -> str | None:
    """Advice when a header reads as one column that another separator would split (';', '|', a tab or a
    comma), naming that separator; None otherwise. With `column`, only a split that yields it counts."""
    if len(header) != 1:
        return None
    sep = next((s for s in (";", "|", "\t", ",") if (column in header[0].split(s) if column else s in header[0])), None)
    if sep is None:
        return None
    shown_sep = "tab" if sep == "\t" else repr(sep)
    return (f"the header reads as one column, {shown(header[0])}: the file looks {shown_sep}-separated; "
            "save it with commas (.csv) or tabs (.tsv), or as parquet")


def require_columns(present, wanted, path) -> None:
    """Raise naming the first missing column and the closest existing names."""
    present = [str(c) for c in present]
    for col in wanted:
        if col not in present:
            # names equal but for case or spaces first ('ISBN' for 'isbn'), then the closest by spelling
            same = [c for c in present if c.strip().casefold() == str(col).strip().casefold()]
            close = same or difflib.get_close_matches(col, present, n=3, cutoff=0.5)
            hint = separator_hint(present, str(col))
            if hint is not None:  # the whole header read as one column: another separator
                raise TowersError(f"{where(path, shown(str(col)))}: no such column; {hint}")
            hint = (f"did you mean {', '.join(repr(c) for c in close)}?" if close
                    else f"columns present: {', '.join(shown(c) for c in present[:12])}")
            raise TowersError(f"{where(path, shown(str(col)))}: no such column; {hint} (fix the column name where it is "
                              "given, or the file)")


def normalise_ids(series: pd.Series, path, column) -> np.ndarray:
    """Return ids as an int64 or a str object array; reject missing or mixed-type ids."""
    missing = series.isna().to_numpy()
    if missing.any():
        row = int(np.flatnonzero(missing)[0])
        raise TowersError(f"{where(path, column, row + 1)}: missing id; every row needs an id (drop or fill such rows)")
    if pd.api.types.is_bool_dtype(series):
        raise TowersError(f"{where(path, column)}: ids are true/false values; use a column of codes or names")
    if pd.api.types.is_integer_dtype(series):
        return series.to_numpy(dtype=np.int64)
    if pd.api.types.is_float_dtype(series):
        values = series.to_numpy(dtype=np.float64)
        # infinite or beyond int64 ids would wrap silently in the cast below
        frac = ~np.isfinite(values) | (values != np.round(values)) | (np.abs(values) >= 2.0 ** 63)
        if frac.any():
            row = int(np.flatnonzero(frac)[0])
            raise TowersError(f"{where(path, column, row + 1)}: id {float(values[row])!r} is not a whole 64-bit number; "
                              "ids must be integers or strings")
        return values.astype(np.int64)
    values = series.to_numpy(dtype=object)
    kinds = pd.Series(values).map(type)
    non_str = (~kinds.map(lambda t: t is str)).to_numpy()
    if non_str.any() and not non_str.all():
        row = int(np.flatnonzero(non_str)[0])
        raise TowersError(f"{where(path, column, row + 1)}: mixed id types (found {type(values[row]).__name__} among strings); "
                          "store every id as text or every id as a number")
    return np.asarray(values.astype(str), dtype=object)


def factorize_ids(series: pd.Series, path, column) -> tuple[np.ndarray, np.ndarray]:
    """normalise_ids for a long column, as (codes, distinct ids): ids == uniques[codes].

    The distinct ids come in order of first appearance, as int64 or a str object array. Text columns
    read from parquet or CSV are factorized by arrow without one Python string per row, so a log of
    millions of rows costs its codes plus one string per distinct id. Checks and errors are
    normalise_ids' own (the same first bad row).
    """
    missing = series.isna().to_numpy()
    if missing.any() or pd.api.types.is_bool_dtype(series) or pd.api.types.is_numeric_dtype(series) \
            or not pd.api.types.is_string_dtype(series) or series.dtype == object:
        values = normalise_ids(series, path, column)
        codes, uniques = pd.factorize(values)
        return codes.astype(np.int64, copy=False), np.asarray(uniques, dtype=values.dtype)
    codes, uniques = pd.factorize(series)  # a string dtype: every value is a str, as normalise_ids requires
    return codes.astype(np.int64, copy=False), np.asarray(uniques.to_numpy(dtype=object), dtype=object)


def given_ids(values) -> np.ndarray:
    """Ids handed over by a caller (a list or an array): whole numbers as int64, anything else as text."""
    if isinstance(values, (str, bytes, int, np.integer)):  # one id where a list was meant: similar("BK0001")
        values = [values]
    arr = values if isinstance(values, np.ndarray) else np.asarray(list(values), dtype=object)
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64, copy=False)
    if arr.dtype == object and all(isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_)) for v in arr):
        return arr.astype(np.int64)
    return arr.astype(str).astype(object)


def positions_in(catalog: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """Each id's position in `catalog` (int64, -1 where absent), the id types aligned first."""
    return pd.Index(catalog).get_indexer(align_id_types(ids, catalog)).astype(np.int64, copy=False)


def table_rows(table_ids: np.ndarray, catalog: np.ndarray) -> np.ndarray:
    """Each catalog id's row in a table (int64, -1 where the table lacks it), the id types aligned first. A table
    id that can match no catalog id ('07' against whole numbers, text that is not a number) is simply unmatched:
    the catalog is indexed, not the table, so such ids never collide with each other."""
    at = positions_in(catalog, table_ids)
    rows = np.full(len(catalog), -1, dtype=np.int64)
    hit = np.flatnonzero(at >= 0)
    rows[at[hit]] = hit
    return rows


def padded_form(ids: np.ndarray, catalog: np.ndarray) -> tuple[str, str] | None:
    """(id, catalog id) for the first of `ids` that is a text catalog id with its leading zeros dropped ('1095'
    for '001095': a spreadsheet or an integer column lost them), else None."""
    if catalog.dtype != object or not len(catalog) or not len(ids):
        return None
    text = pd.Series(catalog, dtype=object).astype(str)
    stripped = text.str.lstrip("0").replace("", "0")
    padded = text != stripped
    if not padded.any():
        return None
    by_stripped = pd.Series(text[padded].to_numpy(), index=stripped[padded].to_numpy())
    by_stripped = by_stripped[~by_stripped.index.duplicated()]
    asked = pd.Series(ids, dtype=object).astype(str).str.strip()
    hit = asked.isin(by_stripped.index).to_numpy()
    if not hit.any():
        return None
    first = asked.iloc[int(np.flatnonzero(hit)[0])]
    return first, str(by_stripped[first])


def zero_padded(ids: np.ndarray) -> np.ndarray:
    """bool per id: text holding a whole number written otherwise than it prints ('07', '+7', '-0')."""
    text = pd.Series(ids, dtype=object).astype(str).str.strip()
    return (text.str.fullmatch(DIGITS) & ~text.str.fullmatch(PLAIN_WHOLE)).to_numpy(dtype=bool)


def align_id_types(ids: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """Make `ids` comparable with `reference` ids (an integer log against a text table, say)."""
    if ids.dtype == reference.dtype:
        return ids
    if reference.dtype == object:
        return ids.astype(str).astype(object)
    # reference integers, ids text: parse where possible; unparsable text stays unmatched, and so do whole
    # numbers written otherwise than a number prints ('07', '+7'), which would merge '07' and '0007' into 7
    text = pd.Series(ids, dtype=object).astype(str).str.strip()
    out = np.full(len(ids), np.iinfo(np.int64).min, dtype=np.int64)
    digits = text.str.fullmatch(DIGITS).to_numpy(dtype=bool)  # whole numbers: parsed exactly or not at all
    plain_form = text.str.fullmatch(PLAIN_WHOLE).to_numpy(dtype=bool)
    out[plain_form] = _exact_whole(text[plain_form])
    rest = np.flatnonzero(~digits)
    parsed = pd.to_numeric(text.iloc[rest], errors="coerce").to_numpy(dtype=np.float64)
    with np.errstate(invalid="ignore"):
        # '17.0' matches id 17; '1.5' must not be truncated onto id 1, nor '1.2e18' rounded onto a neighbour
        ok = np.isfinite(parsed) & (parsed == np.round(parsed)) & (np.abs(parsed) < 2.0 ** 53)
    out[rest[ok]] = parsed[ok].astype(np.int64)
    return out


def _exact_whole(text: pd.Series) -> np.ndarray:
    """Whole numbers written plainly (PLAIN_WHOLE, up to 19 digits) as int64, exactly: a 19-digit id is read as
    two halves, since a float would round it onto a neighbouring id; one beyond int64 gets the no-match mark."""
    out = np.full(len(text), np.iinfo(np.int64).min, dtype=np.int64)
    negative = text.str.startswith("-").to_numpy(dtype=bool)
    body = text.str.lstrip("-")
    long = (body.str.len() == 19).to_numpy(dtype=bool)
    out[~long] = text[~long].astype(np.int64).to_numpy()
    if long.any():
        high = body[long].str[:-9].astype(np.int64).to_numpy()
        low = body[long].str[-9:].astype(np.int64).to_numpy()
        fits = (high < 9_223_372_036) | ((high == 9_223_372_036) & (low <= 854_775_807))
        value = np.where(fits, high, 0) * 1_000_000_000 + np.where(fits, low, 0)
        sign = np.where(negative[long], -1, 1)
        out[np.flatnonzero(long)[fits]] = (sign * value)[fits]
    return out


def check_unique_ids(ids: np.ndarray, path, column) -> None:
    dup = pd.Series(ids).duplicated().to_numpy()
    if dup.any():
        row = int(np.flatnonzero(dup)[0])
        raise TowersError(f"{where(path, column, row + 1)}: duplicate id {ids[row:row + 1].tolist()[0]!r}; "
                          f"a feature table needs one row per id "
                          "(deduplicate it)")


def _number_fix(value, feature: bool) -> str:
    """The fix for text in a column of numbers: a number written with a currency sign, unit or thousands
    separators ('£5.35', '1,299') is written bare; other text is a value to fix, or (features) a category."""
    bare = re.sub(r"[^\d.\-]", "", str(value))
    if bare and bare != str(value).strip() and re.fullmatch(r"-?\d+(\.\d+)?", bare):
        return f"write the number alone ({bare}), without currency signs, units or thousands separators"
    return "fix the value" + (", or declare the feature as categorical in the config" if feature else
                              "; this column must hold numbers")


def numeric_column(series: pd.Series, path, column, allow_missing: bool = True, feature: bool = False) -> np.ndarray:
    """A float64 view of a column, with errors for text, infinities and (optionally) missing values.

    feature: the column is a numeric feature, so a value that reads as a date suggests the date kind.
    """
    if pd.api.types.is_bool_dtype(series):
        values = series.astype(float).to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        values = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        bad_text = np.isnan(values) & series.notna().to_numpy()
        if bad_text.any():
            row = int(np.flatnonzero(bad_text)[0])
            value = series.iloc[row]
            if feature and not np.isnat(date_column(series.iloc[row:row + 1], path, column, strict=False)[0]):
                raise TowersError(f"{where(path, column, row + 1)}: {value!r} is not a number but reads as a date; "
                                  "declare the feature with kind: date (its age in days) or fix the value")
            raise TowersError(f"{where(path, column, row + 1)}: {value!r} is not a number; {_number_fix(value, feature)}")
    inf = np.isinf(values)
    if inf.any():
        row = int(np.flatnonzero(inf)[0])
        raise TowersError(f"{where(path, column, row + 1)}: infinite value; replace it with a finite number or leave it empty")
    if not allow_missing and np.isnan(values).any():
        row = int(np.flatnonzero(np.isnan(values))[0])
        raise TowersError(f"{where(path, column, row + 1)}: missing value; every row needs a number here")
    return values


TIME_FORM = ("write times as ISO 8601 text such as 2026-03-14 09:30:00 (year first: 05/03/2026 could be May or "
             "March), or as numbers")


def time_column(series: pd.Series, path, column) -> np.ndarray:
    """Event times as int64 nanoseconds since the epoch; numbers are taken as given (any unit).

    Text must be ISO 8601: a guessed format would read 05/03 as May in one row and 13/03 as March in the
    next, moving events in time without a word."""
    if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
        return numeric_column(series, path, column, allow_missing=False).astype(np.int64)
    if pd.api.types.is_datetime64_any_dtype(series):
        parsed = series
    else:
        text = series.astype(str).str.strip().where(series.notna().to_numpy())
        parsed = pd.to_datetime(text, errors="coerce", utc=True, format="ISO8601")
    bad = parsed.isna().to_numpy()
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = series.iloc[row]
        what = "missing time; every row needs one" if pd.isna(value) else \
            f"{value!r} is not an ISO 8601 date or time"
        raise TowersError(f"{where(path, column, row + 1)}: {what}; {TIME_FORM}")
    if getattr(parsed.dt, "tz", None) is not None:
        parsed = parsed.dt.tz_convert("UTC").dt.tz_localize(None)
    return parsed.to_numpy(dtype="datetime64[ns]").astype(np.int64)


DATE_FORM = "an ISO date or timestamp such as 2026-03-14 or 2026-03-14T09:30:00+01:00"


def date_column(series: pd.Series, path, column, strict: bool = True) -> np.ndarray:
    """Dates and timestamps as datetime64[us] in UTC (time zones converted, naive values taken as UTC);
    missing values are NaT.

    Reads datetime columns (parquet date and timestamp types) as they are and text as ISO 8601. strict:
    a present value that is not such a date is an error naming its row; otherwise it becomes NaT.
    """
    if pd.api.types.is_datetime64_any_dtype(series):
        parsed = series
    elif pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series):
        parsed = pd.Series(pd.NaT, index=series.index, dtype="datetime64[us]")  # numbers are no dates here
    else:
        # as text first: datetime.date objects and tz-aware timestamps print as ISO, numbers never parse as one
        text = series.astype(str).str.strip().where(series.notna().to_numpy())
        parsed = pd.to_datetime(text, errors="coerce", utc=True, format="ISO8601")
    if getattr(parsed.dt, "tz", None) is not None:
        parsed = parsed.dt.tz_convert("UTC").dt.tz_localize(None)
    out = parsed.to_numpy(dtype="datetime64[us]")
    bad = np.isnat(out) & series.notna().to_numpy()
    if strict and bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = series.iloc[row]
        value = plain(value)
        raise TowersError(f"{where(path, column, row + 1)}: {value!r} is not a date; "
                          f"write {DATE_FORM} (time zones are converted to UTC)")
    return out
