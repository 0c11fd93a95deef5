"""Reading a data cut from disk: CSV, Parquet or CDISC Dataset-JSON v1.1 (JSON form).

A reader only reads.  It checks that the file is there, is of a known kind and has the
shape of its format, records a manifest (size, SHA-256, rows, columns) and hands back the
frame.  Checking the content against the plan is :mod:`trialcut.data.conformance`'s job.

CSV is read entirely as text, so that a value that is not a number can later be reported
with its line in the file (the header is line 1, the first record line 2).  Parquet and
Dataset-JSON carry their own types; their rows are counted from 1.

Dataset-JSON v1.1 structure (from memory of the CDISC Dataset-JSON v1.1 specification,
cross-read with the column attribute list of a published reader's documentation):
top-level ``datasetJSONCreationDateTime``, ``datasetJSONVersion``, ``itemGroupOID``,
``records``, ``name``, ``label``, ``columns`` (each with ``itemOID``, ``name``, ``label``,
``dataType``; optional ``targetDataType``, ``length``, ``displayFormat``, ``keySequence``)
and ``rows``, a list of arrays in column order.  ``decimal`` values are written as strings
so that no precision is lost in a JSON number.  On reading, ``integer``, ``decimal``,
``float`` and ``double`` become float64 (null is NaN), ``boolean`` becomes pandas' nullable
boolean and every other dataType (string, dates and times, URI) stays text.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import re
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from trialcut.errors import DataError, Problem

FORMATS = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet", ".json": "dataset-json"}

# Dataset-JSON dataType -> how the column is held in pandas.
DATASET_JSON_TYPES = ("string", "integer", "decimal", "float", "double", "boolean",
                      "date", "time", "datetime", "URI")
_NUMERIC_JSON_TYPES = ("integer", "decimal", "float", "double")
_REQUIRED_TOP_LEVEL = ("datasetJSONCreationDateTime", "datasetJSONVersion", "itemGroupOID",
                       "records", "name", "label", "columns", "rows")
_REQUIRED_COLUMN_KEYS = ("itemOID", "name", "label", "dataType")
_DECIMAL = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")

# A data cut of a repeated-measures trial is a few megabytes; a file beyond this is an export
# gone wrong (or the wrong file), and reading it whole would take minutes and all the memory.
MAX_DATA_BYTES = 1 << 30


@dataclass(frozen=True)
class RawCut:
    """A data cut as read: the frame and what identifies the file it came from.

    ``first_row`` is the source row number of the frame's first record (2 for CSV, whose
    header is line 1; 1 for Parquet and Dataset-JSON), ``row_word`` how to name it.
    ``typed`` is False when every column is still text (CSV).
    """

    frame: pd.DataFrame
    manifest: dict[str, Any]
    first_row: int = 1
    row_word: str = "record"
    typed: bool = True

    @property
    def file(self) -> str:
        return str(self.manifest.get("file", "<memory>"))


def raw_from_frame(frame: pd.DataFrame, name: str = "<memory>", typed: bool = True) -> RawCut:
    """Wrap an in-memory frame (tests, notebooks) as a RawCut with a content hash."""
    text = frame.to_csv(index=False).encode("utf-8")
    manifest = {"file": name, "format": "memory", "size": len(text),
                "sha256": hashlib.sha256(text).hexdigest(), "rows": int(len(frame)),
                "columns": [str(c) for c in frame.columns]}
    return RawCut(frame.reset_index(drop=True), manifest, 1, "record", typed)


def read_cut(path: str | Path) -> RawCut:
    """Read one data cut; raise DataError naming the file and what to do on any failure."""
    path = Path(path)
    kind = FORMATS.get(path.suffix.lower())
    if kind is None:
        raise _error(path, "data.unknown_format",
                     f"cannot tell the format of the data file from its extension {path.suffix!r}",
                     expected="one of " + ", ".join(sorted(FORMATS)), got=path.suffix or "(none)",
                     hint="export the cut as CSV, Parquet or CDISC Dataset-JSON and name it accordingly")
    if not path.is_file():
        raise _error(path, "data.not_found", "the data file does not exist or is not a file",
                     hint="check the path given with --data")
    size = path.stat().st_size
    if size > MAX_DATA_BYTES:
        raise _error(path, "data.too_large", "the data file is larger than trialcut reads",
                     expected=f"at most {MAX_DATA_BYTES // (1 << 20)} MB", got=f"{size / (1 << 20):.1f} MB",
                     hint="check that this is the analysis dataset; export only the parameters the plan analyses")
    try:
        content = path.read_bytes()
    except OSError as exc:
        raise _error(path, "data.unreadable", f"the data file cannot be read ({exc.strerror})",
                     hint="check the file's permissions") from exc
    if not content.strip():
        raise _error(path, "data.empty", "the data file is empty",
                     hint="export the cut again; the file has no header and no records")
    reader = {"csv": _read_csv, "parquet": _read_parquet, "dataset-json": _read_dataset_json}[kind]
    frame, first_row, row_word, typed = reader(path, content)
    if len(frame) == 0:
        raise _error(path, "data.no_records", "the data file has column names but no records",
                     hint="export the cut again with its records")
    manifest = {"file": str(path), "format": kind, "size": len(content),
                "sha256": hashlib.sha256(content).hexdigest(), "rows": int(len(frame)),
                "columns": [str(c) for c in frame.columns]}
    return RawCut(frame, manifest, first_row, row_word, typed)


def _error(path: Path, code: str, message: str, **extra: Any) -> DataError:
    problem = Problem(code=code, message=message, file=str(path), **extra)
    return DataError(f"cannot read the data cut {path}", [problem])


# --------------------------------------------------------------------------- CSV
def _read_csv(path: Path, content: bytes):
    import csv
    import io

    text = _decode(path, content, "CSV file")
    try:
        # Everything as text: typed conversion happens in the checks, with line numbers.
        # index_col=False and warnings as errors: a line with more fields than the header
        # must be refused, not silently read as an index or cut short.
        with warnings.catch_warnings():
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False,
                                na_values=[""], skip_blank_lines=True, index_col=False)
    except (pd.errors.ParserError, pd.errors.ParserWarning, pd.errors.EmptyDataError, ValueError,
            csv.Error) as exc:
        raise _error(path, "data.malformed_csv", f"the CSV file cannot be parsed: {exc}",
                     hint=_delimiter_hint(text) or
                     "check quoting and that every line has as many fields as the header") from exc
    _check_csv_header(path, frame, text)
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame, 2, "line", False


def _decode(path: Path, content: bytes, what: str) -> str:
    try:
        return content.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = content[:exc.start].count(b"\n") + 1
        column = exc.start - (content.rfind(b"\n", 0, exc.start) + 1) + 1
        raise _error(path, "data.encoding", f"the {what} is not UTF-8 text", line=line, column=column,
                     expected="UTF-8", got=f"byte 0x{content[exc.start]:02x} at line {line}, column {column}",
                     hint="save the file as UTF-8 (a spreadsheet's 'CSV UTF-8' export)") from exc


def _delimiter_hint(text: str) -> str | None:
    """When the header holds no comma but semicolons or tabs, say so: a spreadsheet in a
    locale with the decimal comma writes CSV with ';' between fields."""
    header = text.split("\n", 1)[0]
    if "," in header:
        return None
    for mark, name in ((";", "semicolons (;)"), ("\t", "tabs")):
        if header.count(mark) >= 1:
            return (f"the first line separates its fields with {name}, not commas: export the file "
                    "as comma-separated CSV (with '.' as the decimal mark)")
    return None


def _check_csv_header(path: Path, frame: pd.DataFrame, text: str) -> None:
    names = [str(c) for c in frame.columns]
    unnamed = [c for c in names if c.startswith("Unnamed:")]
    # pandas renames a repeated name 'AVAL' to 'AVAL.1'; names that differ only by spaces
    # ('AVAL' and ' AVAL') become one column once trimmed: both are repeats.
    renamed = [c for c in names if "." in c and c.rsplit(".", 1)[0] in names]
    trimmed = [c.strip() for c in names]
    spaced = sorted({repr(c) for c in names if trimmed.count(c.strip()) > 1})
    if unnamed or renamed or spaced:
        raise _error(path, "data.bad_header", "the CSV header has empty or repeated column names",
                     line=1, got=", ".join(unnamed + renamed + spaced),
                     hint="give every column one unique name in the first line (spaces around a name do not count)")
    if len(names) == 1:
        hint = _delimiter_hint(text)
        if hint:
            raise _error(path, "data.one_column", f"the CSV file reads as a single column {names[0][:60]!r}",
                         line=1, expected="comma-separated fields", got="1 column", hint=hint)


# --------------------------------------------------------------------------- Parquet
def _read_parquet(path: Path, content: bytes):
    import io

    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(io.BytesIO(content))
        frame = _decimals_as_floats(table, table.to_pandas())
    except (pa.ArrowException, OSError, ValueError, TypeError, NotImplementedError) as exc:
        raise _error(path, "data.malformed_parquet", f"the Parquet file cannot be read: {exc}",
                     hint="write the cut again with a Parquet writer (e.g. pandas.DataFrame.to_parquet)") from exc
    frame = frame.reset_index(drop=True)
    frame.columns = [str(c) for c in frame.columns]
    return frame, 1, "record", True


def _decimals_as_floats(table, frame: pd.DataFrame) -> pd.DataFrame:
    """Decimal columns (fixed-point, as databases export them) become float64: every value of
    a score or a study day fits a double's 15 significant digits.  (Done after the conversion
    to pandas, which would otherwise restore a column's older dtype from pandas' metadata.)"""
    import pyarrow as pa

    for field in table.schema:
        if pa.types.is_decimal(field.type) and field.name in frame.columns:
            frame[field.name] = table.column(field.name).cast(pa.float64()).to_numpy(zero_copy_only=False)
    return frame


# --------------------------------------------------------------------------- Dataset-JSON
def _read_dataset_json(path: Path, content: bytes):
    text = _decode(path, content, "Dataset-JSON file")
    try:
        document = json.loads(text, parse_constant=_refuse_constant)
    except json.JSONDecodeError as exc:
        raise _error(path, "data.malformed_json", f"the file is not valid JSON: {exc.msg}",
                     line=exc.lineno, column=exc.colno,
                     hint="export the cut again as CDISC Dataset-JSON v1.1") from exc
    except ValueError as exc:      # NaN or Infinity, which JSON does not have
        raise _error(path, "data.malformed_json", f"the file is not valid JSON: {exc}",
                     hint="write a missing value as null; JSON has no NaN or Infinity") from exc
    except RecursionError as exc:
        raise _error(path, "data.malformed_json", "the JSON is nested too deeply to be a Dataset-JSON file",
                     expected="an object whose rows are arrays of values", got="arrays or objects nested thousands deep",
                     hint="export the cut again as CDISC Dataset-JSON v1.1") from exc
    problems = _dataset_json_structure(document)
    if problems:
        raise DataError(f"{path} is not CDISC Dataset-JSON v1.1",
                        [Problem(file=str(path), **p) for p in problems])
    columns = document["columns"]
    names = [c["name"] for c in columns]
    row_problems = _dataset_json_rows(document["rows"], columns)
    if row_problems:
        raise DataError(f"{path} is not CDISC Dataset-JSON v1.1",
                        [Problem(file=str(path), **p) for p in row_problems])
    frame = pd.DataFrame(document["rows"], columns=names) if document["rows"] else pd.DataFrame(columns=names)
    for column in columns:
        frame[column["name"]] = _json_column(frame[column["name"]], column["dataType"])
    return frame, 1, "record", True


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON value")


def _dataset_json_structure(document: Any) -> list[dict[str, Any]]:
    if not isinstance(document, dict):
        return [dict(code="data.dataset_json_structure", message="the top level is not a JSON object",
                     expected="an object with 'columns' and 'rows'", got=type(document).__name__)]
    if "clinicalData" in document or "referenceData" in document:
        return [dict(code="data.dataset_json_version", message="this is Dataset-JSON v1.0, which is not read",
                     expected="Dataset-JSON v1.1 (top-level 'columns' and 'rows')", got="v1.0 layout",
                     hint="export the cut again as Dataset-JSON v1.1, or as CSV or Parquet")]
    problems = []
    missing = [k for k in _REQUIRED_TOP_LEVEL if k not in document]
    if missing:
        problems.append(dict(code="data.dataset_json_structure",
                             message="required top-level attributes are missing",
                             expected=", ".join(_REQUIRED_TOP_LEVEL), got="missing " + ", ".join(missing),
                             hint="a Dataset-JSON v1.1 file names its columns in 'columns' and holds records in 'rows'"))
    columns = document.get("columns")
    if "columns" in document and (not isinstance(columns, list) or not columns):
        problems.append(dict(code="data.dataset_json_structure", field="columns",
                             message="'columns' must be a non-empty list of column definitions"))
    elif isinstance(columns, list):
        problems += _dataset_json_column_problems(columns)
    if "rows" in document and not isinstance(document["rows"], list):
        problems.append(dict(code="data.dataset_json_structure", field="rows",
                             message="'rows' must be a list of arrays"))
    records = document.get("records")
    if isinstance(records, int) and isinstance(document.get("rows"), list) and records != len(document["rows"]):
        problems.append(dict(code="data.dataset_json_records", field="records",
                             message="'records' does not match the number of rows",
                             expected=str(len(document["rows"])), got=str(records),
                             hint="the file may have been cut short; export it again"))
    return problems


def _dataset_json_column_problems(columns: list[Any]) -> list[dict[str, Any]]:
    problems, seen = [], set()
    for index, column in enumerate(columns):
        where = f"columns[{index}]"
        if not isinstance(column, dict):
            problems.append(dict(code="data.dataset_json_structure", field=where,
                                 message="a column definition must be an object"))
            continue
        missing = [k for k in _REQUIRED_COLUMN_KEYS if k not in column]
        if missing:
            problems.append(dict(code="data.dataset_json_structure", field=where,
                                 message="a column definition lacks required attributes",
                                 expected=", ".join(_REQUIRED_COLUMN_KEYS), got="missing " + ", ".join(missing)))
        if column.get("dataType", "string") not in DATASET_JSON_TYPES:
            problems.append(dict(code="data.dataset_json_type", field=f"{where}.dataType",
                                 message="unknown dataType", expected="one of " + ", ".join(DATASET_JSON_TYPES),
                                 got=repr(column.get("dataType"))))
        name = column.get("name")
        if "name" in column and (not isinstance(name, str) or not name.strip()):
            problems.append(dict(code="data.dataset_json_structure", field=f"{where}.name",
                                 message="a column name must be non-empty text", got=_shown(name)))
            continue
        if name in seen:
            problems.append(dict(code="data.dataset_json_structure", field=f"{where}.name",
                                 message="column name used twice", got=repr(name)))
        seen.add(name)
    return problems


def _dataset_json_rows(rows: list[Any], columns: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Every row is an array of the right length whose values fit their column's dataType."""
    problems: dict[tuple[str, str], list[str]] = {}
    width = len(columns)
    for number, row in enumerate(rows, start=1):
        if not isinstance(row, list) or len(row) != width:
            got = f"{len(row)} values" if isinstance(row, list) else type(row).__name__
            problems.setdefault(("data.dataset_json_row", f"each row must be an array of {width} values"), []).append(
                f"record {number} ({got})")
            continue
        for value, column in zip(row, columns):
            if value is not None and not _fits(value, column["dataType"]):
                key = ("data.dataset_json_value", f"values do not fit column {column['name']}'s dataType {column['dataType']}")
                problems.setdefault(key, []).append(f"record {number} ({_shown(value)})")
    return [dict(code=code, message=message, rows=tuple(found[:10]), got=f"{len(found)} rows",
                 hint="export the cut again as CDISC Dataset-JSON v1.1")
            for (code, message), found in problems.items()]


def _fits(value: Any, data_type: str) -> bool:
    if data_type == "boolean":
        return isinstance(value, bool)
    if data_type == "integer":
        # Integers become float64: beyond 2**53 they would silently lose digits.
        return isinstance(value, int) and not isinstance(value, bool) and abs(value) <= 2 ** 53
    if data_type in ("float", "double", "decimal") and isinstance(value, (int, float)) and not isinstance(value, bool):
        # A number too large for a double (1e999) reads as infinity: not a measurement.
        return _finite(value)
    if data_type in ("float", "double"):
        return False
    if data_type == "decimal":
        # Decimals travel as strings: digits with an optional point and exponent, never
        # 'NaN' or 'Infinity' (missing is null), never beyond a double's range.
        return isinstance(value, str) and _DECIMAL.fullmatch(value.strip()) is not None and _finite(value)
    return isinstance(value, str)


def _finite(value: Any) -> bool:
    try:
        return math.isfinite(float(value))
    except OverflowError:       # an integer with hundreds of digits
        return False


def _shown(value: Any) -> str:
    text = json.dumps(value, ensure_ascii=False, default=str)
    return text if len(text) <= 60 else text[:59] + "…"


def _json_column(values: pd.Series, data_type: str) -> pd.Series:
    if data_type in _NUMERIC_JSON_TYPES:
        return pd.to_numeric(values, errors="raise").astype("float64")
    if data_type == "boolean":
        return values.astype("boolean")
    return values.astype(object).where(values.notna(), None)


def write_dataset_json(frame: pd.DataFrame, path: str | Path, *, name: str = "ADEFF",
                       label: str = "Efficacy analysis dataset", item_group_oid: str | None = None,
                       study_oid: str | None = None, labels: dict[str, str] | None = None,
                       created: str | None = None) -> Path:
    """Write ``frame`` as CDISC Dataset-JSON v1.1 (JSON form); returns the path.

    Integer columns become ``integer``, other numbers ``double``, booleans ``boolean`` and
    everything else ``string``; NaN and None are written as null.  ``created`` fixes the
    creation time stamp (ISO 8601) so that a file can be reproduced byte for byte.
    """
    path = Path(path)
    labels = labels or {}
    group = item_group_oid or f"IG.{name}"
    columns = [_json_column_definition(frame[c], str(c), group, labels.get(str(c), str(c))) for c in frame.columns]
    values = [_json_values(frame.iloc[:, i], col["dataType"]) for i, col in enumerate(columns)]
    rows = [list(record) for record in zip(*values)] if values else [[] for _ in range(len(frame))]
    stamp = created or _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")
    document = {"datasetJSONCreationDateTime": stamp, "datasetJSONVersion": "1.1.0",
                "itemGroupOID": group, "records": len(rows), "name": name, "label": label}
    if study_oid:
        document["studyOID"] = study_oid
    document["columns"] = columns
    document["rows"] = rows
    path.write_text(json.dumps(document, ensure_ascii=False, allow_nan=False), encoding="utf-8")
    return path


def _json_column_definition(values: pd.Series, name: str, group: str, label: str) -> dict[str, Any]:
    if pd.api.types.is_bool_dtype(values):
        data_type = "boolean"
    elif pd.api.types.is_integer_dtype(values):
        data_type = "integer"
    elif pd.api.types.is_numeric_dtype(values):
        data_type = "double"
    else:
        data_type = "string"
    return {"itemOID": f"IT.{group.removeprefix('IG.')}.{name}", "name": name, "label": label, "dataType": data_type}


def _json_values(values: pd.Series, data_type: str) -> list[Any]:
    """:func:`_json_value` of every cell of a column; plain numpy numbers, booleans and text
    columns whole (the same Python values, without a function call per cell)."""
    kind = values.dtype.kind if isinstance(values.dtype, np.dtype) else ""
    plain = ((data_type == "double" and kind == "f") or (data_type == "integer" and kind in "iu")
             or (data_type == "boolean" and kind == "b")
             or (data_type == "string" and isinstance(values.dtype, pd.StringDtype)))
    if not plain:
        return [_json_value(v, data_type) for v in values.to_numpy(dtype=object)]
    if kind == "f" and np.isinf(values.to_numpy()).any():
        return [_json_value(v, data_type) for v in values.to_numpy(dtype=object)]   # raises, naming the value
    cells = values.to_numpy(dtype=object)
    if kind in ("", "f"):
        cells[pd.isna(cells)] = None
    return cells.tolist()


def _json_value(value: Any, data_type: str) -> Any:
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA:
        return None
    if data_type == "boolean":
        return bool(value)
    if data_type == "integer":
        return int(value)
    if data_type == "double":
        number = float(value)
        if not math.isfinite(number):
            raise DataError("cannot write a non-finite number to Dataset-JSON",
                            [Problem(code="data.non_finite", message="JSON has no infinity", got=str(value))])
        return number
    return str(value) if not isinstance(value, (np.generic,)) else str(value.item())
