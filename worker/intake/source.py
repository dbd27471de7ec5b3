"""What the input is: bytes, text, a path or a pyarrow.Table; which format (the
registered readers, detection by suffix and content); the batch-wide settings and
declared gases; the text rules for ids and labels.
"""
from __future__ import annotations

import hashlib
import math
import unicodedata
from dataclasses import dataclass
from pathlib import Path
from collections.abc import Sequence
from typing import Any, Callable

import pyarrow as pa

from .. import adsorbates, units
from ..csvcodec import formula_problem
from .issues import batch_error, echo, nearest, old_spelling, short
from .rows import MAX_ID_CHARS, OLD_SPELLINGS, SETTINGS, Limits, Rows

# what ``read_batch`` reads (anything else is refused as unsupported_source)
Source = bytes | bytearray | memoryview | str | Path | pa.Table


def source_bytes(source: object, batch_label: str | None, limits: Limits) -> bytes:
    label = batch_label or "(unlabelled)"
    if isinstance(source, Path):
        try:
            size = source.stat().st_size
            if size > limits.max_bytes:
                raise batch_error(label, "input_too_large",
                                   f"file is {size} bytes, limit {limits.max_bytes}")
            return source.read_bytes()
        except OSError as exc:
            raise batch_error(label, "unreadable_file", f"cannot read {str(source)!r}: {exc}")
    if isinstance(source, str):
        try:
            data = source.encode("utf-8")
        except UnicodeEncodeError as exc:
            raise batch_error(label, "not_utf8", f"text cannot be encoded as UTF-8: {exc.reason}")
    elif isinstance(source, (bytes, bytearray, memoryview)):
        data = bytes(source)
    else:
        raise batch_error(label, "unsupported_source", "source must be bytes, str, pathlib.Path "
                           f"or pyarrow.Table, not {type(source).__name__}")
    if len(data) > limits.max_bytes:
        raise batch_error(label, "input_too_large",
                           f"input is {len(data)} bytes, limit {limits.max_bytes}")
    return data


def table_digest(table: pa.Table, label: str, limits: Limits) -> str:
    """First 12 hex digits of the SHA-256 of the table in Arrow IPC form."""
    if table.nbytes > limits.max_bytes:
        raise batch_error(label, "input_too_large",
                           f"table holds {table.nbytes} bytes, limit {limits.max_bytes}")
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return hashlib.sha256(sink.getvalue()).hexdigest()[:12]


def table_format(fmt: str | None, label: str) -> str:
    if fmt is not None and str(fmt).lower() not in ("parquet", "table"):
        raise batch_error(label, "unknown_format",
                           f"format {fmt!r} does not apply to a pyarrow.Table (leave it out)")
    return "table"


@dataclass(frozen=True)
class Reader:
    """One input format: how it is recognised and how it is read into ``Rows``.

    A new format is one module that defines its ``read`` and calls
    ``register_reader`` at import; the package ``__init__`` imports it.
    """

    name: str                                  # the ``fmt`` argument that asks for it
    read: Callable[[Any, str, Limits, dict[str, Any]], Rows]   # (source, label, limits, options)
    suffixes: tuple[str, ...] = ()             # file name suffixes (lower case, with the dot)
    sniff: Callable[[bytes], bool] | None = None   # does this content look like the format?
    fallback: bool = False                     # the format of content no sniff recognises
    from_bytes: bool = True                    # False: reads a pyarrow.Table handed over


READERS: dict[str, Reader] = {}


def register_reader(reader: Reader) -> Reader:
    """Make ``reader`` known to ``read_batch`` (formats are tried in registration order)."""
    READERS[reader.name] = reader
    return reader


def format_of(source: object, data: bytes, fmt: str | None, label: str) -> str:
    """The name of the registered file format ``data`` is in: ``fmt`` if given, else
    by the path's suffix, else by content."""
    file_readers = [r for r in READERS.values() if r.from_bytes]
    if fmt is not None:
        fmt = str(fmt).lower()
        names = [r.name for r in file_readers]
        if fmt not in names:
            raise batch_error(label, "unknown_format",
                              f"format {fmt!r} is not {', '.join(names[:-1])} or {names[-1]}")
        return fmt
    if isinstance(source, Path):
        suffix = source.suffix.lower()
        for reader in file_readers:
            if suffix in reader.suffixes:
                return reader.name
    for reader in file_readers:
        if reader.sniff is not None and reader.sniff(data):
            return reader.name
    return next(r.name for r in file_readers if r.fallback)


def decoded(data: bytes, label: str) -> str:
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise batch_error(label, "not_utf8",
                           f"input is not UTF-8 (invalid byte at offset {exc.start})")


def checked_settings(raw: dict[str, Any], where: str, label: str) -> dict[str, Any]:
    """Return the batch-wide settings in ``raw`` checked and typed: units as
    {quantity: canonical unit}, gases as a list of dicts."""
    if not isinstance(raw, dict):
        raise batch_error(label, "wrong_type", f"{where} settings must be an object")
    out: dict[str, Any] = {}
    for key, value in raw.items():
        if value is None:
            continue
        name = str(key).strip().lower()
        if name in OLD_SPELLINGS:
            raise old_spelling(name, f"{where} setting", label)
        if name not in SETTINGS:
            near = nearest(name, SETTINGS)
            hint = f"; did you mean {near!r}?" if near else ""
            raise batch_error(label, "unknown_setting",
                               f"unknown {where} setting {short(key)!r}{hint}", fld=name)
        if name == "units":
            out[name] = units_setting(value, f"{where} units", "units", label)
        elif name == "sample_mass_g":
            mass = positive_float(value)
            if mass is None:
                raise batch_error(label, "invalid_setting",
                                   f"{where} sample_mass_g {short(value)!r} is not a positive number",
                                   fld=name)
            out[name] = mass
        elif name == "gases":
            if not isinstance(value, list):
                raise batch_error(label, "invalid_gas", f"{where} gases must be a list", fld=name)
            out[name] = list(value)
        else:
            out[name] = str(value)
    return out


def units_setting(value: Any, where: str, fld: str, label: str) -> dict[str, str]:
    try:
        return units.parse_units_declaration(value)
    except units.UnknownUnit as exc:
        raise batch_error(label, "unknown_unit", f"{where}: {exc}", fld=fld)
    except ValueError as exc:
        raise batch_error(label, "invalid_setting", f"{where}: {exc}", fld=fld)


def declared_gases(raw: Sequence[object], label: str) -> list[adsorbates.Adsorbate]:
    """The Adsorbates declared for this batch (argument first, then the file's)."""
    declared: list[adsorbates.Adsorbate] = []
    for i, item in enumerate(raw):
        fld = f"gases[{i}]"
        if not isinstance(item, dict):
            raise batch_error(label, "invalid_gas", "a declared gas must be an object with name "
                               "and molar_mass_g_per_mol", fld=fld)
        allowed = ("name", "molar_mass_g_per_mol", "critical_temperature_k")
        for key in item:
            if key not in allowed:
                near = nearest(key, allowed)
                raise batch_error(label, "invalid_gas", f"unknown key {short(key)!r}"
                                   + (f"; did you mean {near!r}?" if near else ""), fld=fld)
        name = item.get("name")
        if not isinstance(name, str) or not name.strip() or id_problem(name.strip()):
            raise batch_error(label, "invalid_gas", "needs a name (text usable as an id)", fld=fld)
        problem = formula_problem(name.strip())
        if problem:  # the name is the adsorbate key of every table, like an id
            raise batch_error(label, "formula_start", f"gas name {echo(name.strip())} {problem}",
                              fld=fld)
        mass = positive_float(item.get("molar_mass_g_per_mol"))
        if mass is None:
            raise batch_error(label, "invalid_gas", f"gas {short(name)!r}: molar_mass_g_per_mol "
                               f"{short(item.get('molar_mass_g_per_mol'))!r} is not a positive "
                               "number", fld=fld)
        tc = item.get("critical_temperature_k")
        if tc is not None:
            tc = positive_float(tc)
            if tc is None:
                raise batch_error(label, "invalid_gas", f"gas {short(name)!r}: "
                                   "critical_temperature_k is not a positive number", fld=fld)
        same = [g for g in declared if g.id == name.strip()]
        if same:
            if (same[0].molar_mass_g_per_mol, same[0].critical_temperature_k) != (mass, tc):
                raise batch_error(label, "invalid_gas", f"gas {short(name)!r} is declared twice "
                                   "with different values", fld=fld)
            continue
        try:
            declared.append(adsorbates.declare(name.strip(), mass, critical_temperature_k=tc))
        except ValueError as exc:
            raise batch_error(label, "invalid_gas", f"gas {short(name)!r}: {exc}", fld=fld)
    return declared


def positive_float(value: Any) -> float | None:
    if isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError, OverflowError):
        return None
    return number if math.isfinite(number) and number > 0 else None


def character_problem(value: str, format_characters: bool) -> str | None:
    """Why the characters of ``value`` make it unusable text, or None: a lone surrogate
    (not Unicode text at all; JSON's \\ud800 escapes must come in high-low pairs), a control
    character and, where ``format_characters``, an invisible format character (category
    Cf: bidi controls such as U+202E, zero-width characters such as U+200B), with which
    two ids that look the same are not."""
    if value.isprintable():  # fast path: every refused character is non-printable
        return None
    for ch in value:
        category = unicodedata.category(ch)
        if category == "Cs":
            return (f"contains a lone surrogate (U+{ord(ch):04X}), which is not Unicode text "
                    "(a JSON \\uD800-\\uDFFF escape must be one of a high-low pair)")
        if category in ("Cc", "Zl", "Zp"):
            return "contains a control character"
        if category == "Cf" and format_characters:
            return (f"contains the invisible format character U+{ord(ch):04X} "
                    f"{unicodedata.name(ch, '(unnamed)')} (bidi controls and zero-width "
                    "characters make different ids look the same)")
    return None


def id_problem(value: str) -> str | None:
    """Why ``value`` cannot be an id (it may become a file name), or None."""
    if len(value) > MAX_ID_CHARS:
        return f"is longer than {MAX_ID_CHARS} characters"
    if "/" in value or "\\" in value:
        return "contains a path separator"
    if value in (".", ".."):
        return "is a relative path name"
    return character_problem(value, format_characters=True)


def label_problem(label: str) -> str | None:
    return id_problem(label) if label.strip() else "is empty"


def check_batch_label(label: str, fallback: str) -> None:
    problem = label_problem(label)
    if problem:
        raise batch_error(fallback, "invalid_batch_label", f"batch label {echo(label)} {problem}")

