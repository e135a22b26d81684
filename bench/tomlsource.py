"""Reading TOML files a person wrote, and pointing errors at the line that caused them.

``tomllib`` gives plain dicts without positions, so :class:`TomlSource` re-scans the raw text
once and records the line of every key, table header, array-of-tables entry and array item,
addressed by the same key paths pydantic reports (``("steps", 2, "rbw")``). Validation errors
are then turned into one-line :class:`~bench.errors.ConfigError` messages
``FILE:LINE: KEY.PATH: expected ..., found ...``.

This module knows TOML and pydantic, but nothing about sequences or benches.
"""

from __future__ import annotations

import difflib
import json
import re
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pydantic
from pydantic_core import PydanticCustomError

from bench.errors import ConfigError

__all__ = [
    "KeyPath",
    "TomlSource",
    "read_toml",
    "parse_toml",
    "is_file",
    "format_key_path",
    "format_value",
    "suggest",
    "bench_error",
    "cross_check_error",
    "check_schema",
    "validation_to_config_error",
    "quantity",
    "quantity_list",
]

KeyPath = tuple[str | int, ...]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_SYNTAX_POSITION = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_SYNTAX_END = re.compile(r"\s*\(at end of document\)\s*$")


@dataclass(frozen=True)
class TomlSource:
    """A parsed TOML file with the line of every key path.

    Attributes
    ----------
    file : str
        The path as the user gave it (used in messages).
    text : str
        The raw text.
    data : dict
        What ``tomllib`` parsed.
    lines : dict
        Key path -> 1-based line where that key, table or item starts.
    """

    file: str
    text: str
    data: dict[str, Any]
    lines: dict[KeyPath, int] = field(default_factory=dict)

    def line_of(self, path: KeyPath) -> int:
        """Line of ``path``, or of its nearest enclosing key or table (1 at the top level)."""
        for end in range(len(path), 0, -1):
            line = self.lines.get(tuple(path[:end]))
            if line is not None:
                return line
        return 1

    def error(self, path: KeyPath, message: str) -> ConfigError:
        """A one-line ConfigError located at ``path``."""
        return ConfigError(message, file=self.file, line=self.line_of(path),
                           key=format_key_path(path) or None)


def read_toml(path: str | Path) -> TomlSource:
    """Read and parse a TOML file; syntax errors become a one-line ConfigError.

    Parameters
    ----------
    path : str or Path
        File to read (UTF-8).

    Raises
    ------
    ConfigError
        ``FILE:LINE: invalid TOML (column C): <what tomllib said>`` or a read failure.
    """
    file = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise _with_all(ConfigError(f"expected a readable UTF-8 TOML file, found {_os_reason(exc)}",
                                    file=file)) from exc
    return parse_toml(text, file)


def parse_toml(text: str, file: str) -> TomlSource:
    """Parse TOML text already in memory (a packaged resource, a test string).

    Parameters
    ----------
    text : str
        The TOML text.
    file : str
        Name used in messages, as the user would recognise it.

    Raises
    ------
    ConfigError
        ``FILE:LINE: expected valid TOML (column C), found a syntax error: ...``.
    """
    if text.startswith("\ufeff"):
        raise _with_all(ConfigError("expected UTF-8 text without a byte-order mark, found one at the "
                                    "start of the file: save it as plain UTF-8", file=file, line=1))
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _with_all(_syntax_error(file, text, str(exc))) from exc
    return TomlSource(file=file, text=text, data=data, lines=_KeyLineScanner(text).scan())


def is_file(path: str | Path) -> bool:
    """True when ``path`` names an existing regular file.

    A path the system cannot even look up (a name longer than the file system allows, a loop of
    symbolic links) is no file either, instead of an ``OSError`` escaping from ``Path.is_file``.
    """
    try:
        return Path(path).is_file()
    except (OSError, ValueError):  # ValueError: a NUL byte in the path
        return False


def _os_reason(exc: Exception) -> str:
    if isinstance(exc, FileNotFoundError):
        return "no such file"
    if isinstance(exc, UnicodeDecodeError):
        return "bytes that are not UTF-8"
    return getattr(exc, "strerror", None) or type(exc).__name__


def _syntax_error(file: str, text: str, message: str) -> ConfigError:
    """tomllib says '... (at line X, column Y)' (Python < 3.14 has no attributes for it)."""
    match = _SYNTAX_POSITION.search(message)
    if match:
        line, column = int(match.group(1)), int(match.group(2))
        what = message[:match.start()]
    else:
        line, column = text.count("\n") + 1, None
        what = _SYNTAX_END.sub("", message)
    where = f" (column {column})" if column else ""
    return ConfigError(f"expected valid TOML{where}, found a syntax error: {_lower_first(what)}",
                       file=file, line=line)


def _lower_first(text: str) -> str:
    return text[:1].lower() + text[1:] if text else text


def _with_all(error: ConfigError, all_errors: tuple[ConfigError, ...] | None = None) -> ConfigError:
    error.all_errors = all_errors if all_errors is not None else (error,)
    return error


# --------------------------------------------------------------------------- line scanner


class _KeyLineScanner:
    """Walk TOML text (already known to be valid) and note the line of every key path."""

    def __init__(self, text: str) -> None:
        self.text = text
        self.pos = 0
        self.line = 1
        self.lines: dict[KeyPath, int] = {}
        self.array_counts: dict[KeyPath, int] = {}

    def scan(self) -> dict[KeyPath, int]:
        prefix: KeyPath = ()
        while True:
            self._skip_space(newlines=True)
            if self.pos >= len(self.text):
                return self.lines
            if self.text.startswith("[[", self.pos):
                prefix = self._array_header()
            elif self.text[self.pos] == "[":
                prefix = self._table_header()
            else:
                self._key_value(prefix)

    # ---- headers

    def _array_header(self) -> KeyPath:
        line = self.line
        self._advance(2)
        names = self._key()
        self._skip_past("]]")
        parent = self._resolve(names[:-1])
        array = parent + (names[-1],)
        index = self.array_counts.get(array, -1) + 1
        self.array_counts[array] = index
        self._note_prefixes(array, line)
        self.lines[array + (index,)] = line
        return array + (index,)

    def _table_header(self) -> KeyPath:
        line = self.line
        self._advance(1)
        names = self._key()
        self._skip_past("]")
        path = self._resolve(names)
        self._note_prefixes(path, line)
        self.lines[path] = line
        return path

    def _resolve(self, names: KeyPath) -> KeyPath:
        """A header name inside an array of tables refers to its latest entry."""
        path: KeyPath = ()
        for name in names:
            path += (name,)
            if path in self.array_counts:
                path += (self.array_counts[path],)
        return path

    def _note_prefixes(self, path: KeyPath, line: int) -> None:
        for end in range(1, len(path) + 1):
            self.lines.setdefault(path[:end], line)

    # ---- key = value

    def _key_value(self, prefix: KeyPath) -> None:
        line = self.line
        names = self._key()
        path = prefix + names
        self._note_prefixes(path, line)
        self.lines[path] = line
        self._skip_space()
        self._advance(1)  # '='
        self._skip_space()
        self._value(path)

    def _key(self) -> KeyPath:
        names: list[str] = []
        while True:
            self._skip_space()
            names.append(self._simple_key())
            self._skip_space()
            if self._peek() != ".":
                return tuple(names)
            self._advance(1)

    def _simple_key(self) -> str:
        char = self._peek()
        if char in "\"'":
            start = self.pos
            self._string()
            return tomllib.loads("k = " + self.text[start:self.pos])["k"]
        match = _BARE_KEY.match(self.text, self.pos)
        if match is None:  # cannot happen in valid TOML; stop scanning this line
            self._skip_line()
            return ""
        self._advance(match.end() - self.pos)
        return match.group(0)

    # ---- values

    def _value(self, path: KeyPath) -> None:
        char = self._peek()
        if char == "{":
            self._inline_table(path)
        elif char == "[":
            self._array(path)
        elif char in "\"'":
            self._string()
        else:
            while self.pos < len(self.text) and self.text[self.pos] not in ",]}\n#":
                self._advance(1)

    def _inline_table(self, path: KeyPath) -> None:
        self._advance(1)
        while True:
            self._skip_space(newlines=True)
            if self._peek() in ("}", ""):
                self._advance(1)
                return
            line = self.line
            key_path = path + self._key()
            self._note_prefixes(key_path, line)
            self.lines[key_path] = line
            self._skip_space()
            self._advance(1)  # '='
            self._skip_space()
            self._value(key_path)
            self._skip_space(newlines=True)
            if self._peek() == ",":
                self._advance(1)

    def _array(self, path: KeyPath) -> None:
        self._advance(1)
        index = 0
        while True:
            self._skip_space(newlines=True)
            if self._peek() in ("]", ""):
                self._advance(1)
                return
            self.lines[path + (index,)] = self.line
            self._value(path + (index,))
            self._skip_space(newlines=True)
            if self._peek() == ",":
                self._advance(1)
                index += 1

    def _string(self) -> None:
        quote = self._peek()
        triple = self.text.startswith(quote * 3, self.pos)
        self._advance(3 if triple else 1)
        end_mark = quote * 3 if triple else quote
        while self.pos < len(self.text):
            if quote == '"' and self.text[self.pos] == "\\":
                self._advance(2)
            elif self.text.startswith(end_mark, self.pos):
                self._advance(len(end_mark))
                while triple and self._peek() == quote:  # up to two quotes may end the content
                    self._advance(1)
                return
            else:
                self._advance(1)

    # ---- low level

    def _peek(self) -> str:
        return self.text[self.pos] if self.pos < len(self.text) else ""

    def _advance(self, count: int) -> None:
        chunk = self.text[self.pos:self.pos + count]
        self.line += chunk.count("\n")
        self.pos += len(chunk)

    def _skip_space(self, newlines: bool = False) -> None:
        while self.pos < len(self.text):
            char = self.text[self.pos]
            if char in " \t\r" or (newlines and char == "\n"):
                self._advance(1)
            elif char == "#":
                self._skip_line(keep_newline=True)
            else:
                return

    def _skip_line(self, keep_newline: bool = False) -> None:
        end = self.text.find("\n", self.pos)
        end = len(self.text) if end < 0 else end
        self._advance(end - self.pos + (0 if keep_newline else 1))

    def _skip_past(self, mark: str) -> None:
        while self.pos < len(self.text) and not self.text.startswith(mark, self.pos):
            if self._peek() in "\"'":
                self._string()
            else:
                self._advance(1)
        self._advance(len(mark))


# --------------------------------------------------------------------------- messages


def format_key_path(path: KeyPath) -> str:
    """``("steps", 2, "area", "x")`` -> ``steps[2].area.x``; odd keys are quoted."""
    text = ""
    for part in path:
        if isinstance(part, int):
            text += f"[{part}]"
        else:
            name = part if _BARE_KEY.fullmatch(part) else json.dumps(part, ensure_ascii=False)
            text += f".{name}" if text else name
    return text


def format_value(value: Any) -> str:
    """Show a value the way it looks in TOML, short: ``"120 kHz"``, ``120000``, ``a table``."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, (list, tuple)):
        if len(value) <= 4 and all(isinstance(v, (str, int, float)) for v in value):
            return "[" + ", ".join(format_value(v) for v in value) + "]"
        return f"a list of {len(value)} item{'s' if len(value) != 1 else ''}"
    return "a value of another type"


def suggest(word: str, choices: typing.Iterable[str]) -> str:
    """`` (did you mean 'x'?)`` for the closest choice (difflib), or an empty string."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def bench_error(message: str) -> PydanticCustomError:
    """An error raised inside a validator that keeps our wording through pydantic."""
    return PydanticCustomError("bench", "{message}", {"message": message})


def cross_check_error(problems: list[tuple[KeyPath, str]]) -> PydanticCustomError:
    """One pydantic error carrying several (relative key path, message) problems.

    A model validator sees the whole model but pydantic lets it raise one error; the
    problems are unpacked again by :func:`validation_to_config_error`.
    """
    return PydanticCustomError("bench_cross_check", "{message}",
                               {"message": problems[0][1], "problems": tuple(problems)})


def check_schema(source: TomlSource, version: int = 1) -> None:
    """Refuse a file without ``schema = <version>`` before anything else is checked."""
    if "schema" not in source.data:
        raise _with_all(ConfigError(f"expected `schema = {version}` at the top of the file, "
                                    "found no schema key", file=source.file, line=1,
                                    key="schema"))
    found = source.data["schema"]
    if type(found) is not int or found != version:  # noqa: E721 - 1.0 and true are not schema 1
        raise _with_all(source.error(("schema",), f"expected schema {version} (the only "
                                                  f"version this tool reads), found "
                                                  f"{format_value(found)}"))


def validation_to_config_error(source: TomlSource, exc: pydantic.ValidationError,
                               root: type[pydantic.BaseModel]) -> ConfigError:
    """Translate a pydantic ValidationError into our one-line ConfigError.

    The message is the error that comes first in the file (lowest line); every error, in
    file order, is kept on the returned exception as ``.all_errors``.
    """
    located: list[tuple[int, int, ConfigError]] = []
    items = _drop_echoes(exc.errors(include_url=False))
    for order, item in enumerate(items):
        for path, message in _expand(source, item, root):
            error = source.error(path, message)
            located.append((error.line or 1, order, error))
    located.sort(key=lambda entry: (entry[0], entry[1]))
    errors = tuple(entry[2] for entry in located)
    first = errors[0]
    copy = ConfigError(first.message, file=first.file, line=first.line, key=first.key)
    return _with_all(copy, errors)


def _drop_echoes(items: list[dict]) -> list[dict]:
    """Drop errors that only echo another one.

    A misspelt key gives 'unknown key' and 'missing key': keep only the first, which names
    both (``unknown key 'rwb' (did you mean 'rbw'?)``). A list whose items fail is also
    reported as too short: keep the item errors.
    """
    unknown: dict[tuple, list[str]] = {}
    for item in items:
        if item["type"] == "extra_forbidden":
            unknown.setdefault(tuple(item["loc"][:-1]), []).append(str(item["loc"][-1]))
    kept = []
    for item in items:
        loc = tuple(item["loc"])
        if item["type"] == "missing" and loc and suggest(str(loc[-1]), unknown.get(loc[:-1], [])):
            continue
        if item["type"] == "too_short" and _has_item_errors(loc, items):
            continue  # pydantic counts only the items that validated
        kept.append(item)
    return kept


def _has_item_errors(loc: tuple, items: list[dict]) -> bool:
    return any(len(other["loc"]) > len(loc) and tuple(other["loc"][:len(loc)]) == loc
               for other in items)


def _expand(source: TomlSource, item: dict, root: type[pydantic.BaseModel]
            ) -> list[tuple[KeyPath, str]]:
    loc = _strip_tags(tuple(p for p in item["loc"] if p != "[key]"), source.data, root)
    kind = item["type"]
    if kind == "bench_cross_check":
        return [(loc + tuple(rel), message) for rel, message in item["ctx"]["problems"]]
    if kind in ("union_tag_invalid", "union_tag_not_found"):
        union = _discriminated(_annotation_at(loc, source.data, root)[0])
        tags = list(union[1]) if union else []
        return [(loc + (_tag_key(item),), _tag_message(item, tags))]
    if kind == "extra_forbidden":
        return [(loc, _unknown_key_message(loc, source.data, root))]
    return [(loc, _message(item))]


# ---- pydantic locations and discriminated unions


def _strip_tags(loc: KeyPath, data: Any, root: Any) -> KeyPath:
    """Drop the union tag pydantic inserts in locations (``steps.2.grid.area``)."""
    out: list[str | int] = []
    annotation: Any = root
    raw: Any = data
    index = 0
    while index < len(loc):
        part = loc[index]
        union = _discriminated(annotation)
        if union is not None and isinstance(raw, dict):
            tag_key, members = union
            if part in members:  # pydantic's tag, not a key of the file
                annotation, index = members[part], index + 1
                continue
        out.append(part)
        annotation = _child_annotation(annotation, part, raw)
        raw = _raw_child(raw, part)
        index += 1
    return tuple(out)


def _unwrap(annotation: Any) -> Any:
    """Peel Annotated / Optional to the interesting type."""
    while True:
        origin = typing.get_origin(annotation)
        if origin is typing.Annotated:
            annotation = typing.get_args(annotation)[0]
        elif origin in (typing.Union, types.UnionType):
            args = [a for a in typing.get_args(annotation) if a is not type(None)]
            if len(args) != 1:
                return annotation
            annotation = args[0]
        else:
            return annotation


def _discriminated(annotation: Any) -> tuple[str, dict[str, Any]] | None:
    """(tag key, {tag value: model}) if ``annotation`` is a union of models tagged by a key."""
    if typing.get_origin(annotation) is not typing.Annotated:
        return None
    inner = typing.get_args(annotation)[0]
    if typing.get_origin(inner) not in (typing.Union, types.UnionType):
        return None
    members: dict[str, Any] = {}
    tag_key = None
    for model in typing.get_args(inner):
        for name, info in getattr(model, "model_fields", {}).items():
            literal = typing.get_args(info.annotation)
            if typing.get_origin(info.annotation) is typing.Literal and name == "kind":
                tag_key = info.alias or name
                members.update({value: model for value in literal})
    return (tag_key, members) if tag_key else None


def _child_annotation(annotation: Any, part: str | int, raw: Any) -> Any:
    annotation = _member(annotation, raw)
    annotation = _unwrap(annotation)
    origin = typing.get_origin(annotation)
    args = typing.get_args(annotation)
    if isinstance(annotation, type) and issubclass(annotation, pydantic.BaseModel):
        for name, info in annotation.model_fields.items():
            if (info.alias or name) == part:
                return info.annotation
        return None
    if origin in (tuple, list) and args:
        if isinstance(part, int) and len(args) > 1 and args[-1] is not Ellipsis:
            return args[part] if part < len(args) else None
        return args[0]
    if origin is dict and args:
        return args[1]
    return None


def _member(annotation: Any, raw: Any) -> Any:
    """The member of a tagged union that ``raw`` selects (None if it selects none)."""
    union = _discriminated(annotation)
    if union is None:
        return annotation
    tag_key, members = union
    return members.get(raw.get(tag_key)) if isinstance(raw, dict) else None


def _raw_child(raw: Any, part: str | int) -> Any:
    if isinstance(raw, dict):
        return raw.get(part)
    if isinstance(raw, list) and isinstance(part, int) and part < len(raw):
        return raw[part]
    return None


def _annotation_at(loc: KeyPath, data: Any, root: Any) -> tuple[Any, Any]:
    """(annotation, raw value) found by walking ``loc`` from the root model."""
    annotation, raw = root, data
    for part in loc:
        annotation = _child_annotation(annotation, part, raw)
        raw = _raw_child(raw, part)
    return annotation, raw


def _model_at(loc: KeyPath, data: Any, root: Any) -> Any:
    annotation, raw = _annotation_at(loc, data, root)
    return _unwrap(_member(annotation, raw))


def _unknown_key_message(loc: KeyPath, data: Any, root: Any) -> str:
    word = str(loc[-1])
    model = _model_at(loc[:-1], data, root)
    keys: list[str] = []
    if isinstance(model, type) and issubclass(model, pydantic.BaseModel):
        keys = [info.alias or name for name, info in model.model_fields.items()]
    hint = suggest(word, keys)
    if not hint and keys:
        hint = " (expected one of: " + ", ".join(sorted(keys)) + ")"
    return f"unknown key '{word}'{hint}"


def _tag_key(item: dict) -> str:
    return str(item.get("ctx", {}).get("discriminator", "'kind'")).strip("'")


def _tag_message(item: dict, choices: list[str]) -> str:
    ctx = item.get("ctx", {})
    listing = ", ".join(choices)
    if item["type"] == "union_tag_not_found":
        return f"expected a kind ({listing}), found no kind key"
    found = ctx.get("tag", "")
    return f"expected one of {listing}, found {format_value(found)}{suggest(found, choices)}"


# ---- plain pydantic errors in our words

_EXPECTED_TYPE = {
    "string_type": "a string in quotes",
    "int_type": "an integer",
    "int_parsing": "an integer",
    "int_from_float": "an integer",
    "float_type": "a number",
    "bool_type": "true or false",
    "list_type": "a list [...]",
    "tuple_type": "a list [...]",
    "dict_type": "a table",
    "model_type": "a table",
    "model_attributes_type": "a table",
}


def _message(item: dict) -> str:
    kind, ctx = item["type"], item.get("ctx", {})
    found = format_value(item.get("input"))
    if kind == "bench":
        return ctx["message"]
    if kind == "missing":
        return "expected a value (required key), found nothing"
    if kind in _EXPECTED_TYPE:
        return f"expected {_EXPECTED_TYPE[kind]}, found {found}"
    if kind == "literal_error":
        choices = [c.strip().strip("'") for c in re.split(r",| or ", ctx.get("expected", ""))
                   if c.strip()]
        value = item.get("input")
        hint = suggest(value, choices) if isinstance(value, str) else ""
        return f"expected one of {', '.join(choices)}, found {found}{hint}"
    if kind == "string_pattern_mismatch":
        return f"expected 1 to 64 lower-case letters, digits, '-' or '_', found {found}"
    if kind in ("too_short", "too_long"):
        return _length_message(kind, ctx, item.get("input"))
    if kind in ("string_too_short", "string_too_long"):
        bound = ctx.get("min_length") if kind == "string_too_short" else ctx.get("max_length")
        most = "at least" if kind == "string_too_short" else "at most"
        return f"expected a string of {most} {bound} character{'s' if bound != 1 else ''}, " \
               f"found {found}"
    if kind in ("greater_than", "greater_than_equal", "less_than", "less_than_equal"):
        sign = {"greater_than": ">", "greater_than_equal": ">=", "less_than": "<",
                "less_than_equal": "<="}[kind]
        bound = next(iter(v for k, v in ctx.items() if k in ("gt", "ge", "lt", "le")))
        return f"expected a value {sign} {bound}, found {found}"
    return f"expected a valid value ({_lower_first(item['msg'])}), found {found}"


def _length_message(kind: str, ctx: dict, value: Any) -> str:
    count = len(value) if isinstance(value, (list, tuple, dict, str)) else ctx.get("actual_length")
    found = "an empty list" if count == 0 else f"{count} item{'s' if count != 1 else ''}"
    if kind == "too_short":
        wanted = ctx.get("min_length")
        return f"expected at least {wanted} item{'s' if wanted != 1 else ''}, found {found}"
    wanted = ctx.get("max_length")
    return f"expected at most {wanted} item{'s' if wanted != 1 else ''}, found {found}"


# --------------------------------------------------------------------------- quantity fields


def quantity(dimension: str, *, positive: bool = False, non_negative: bool = False,
             radio: bool = False, at_most: str | None = None) -> typing.Any:
    """A model field type: a quantity string parsed by :func:`bench.units.parse` to SI.

    Parameters
    ----------
    dimension : str
        A key of :data:`bench.units.DIMENSIONS` (``"frequency"``, ``"length"``, ...).
    positive, non_negative : bool
        Refuse zero/negative (or negative) values, naming the text as written.
    radio : bool
        A radio frequency: a non-zero value below 1 Hz is refused as a wrong prefix
        (``"30 mHz"`` -> did you mean ``"30 MHz"``); see :func:`bench.units.parse`.
    at_most : str, optional
        The largest value, written as a quantity (``"1 m/s"``): a typo guard, named as written.
    """
    return typing.Annotated[float, pydantic.BeforeValidator(
        _QuantityParser(dimension, positive, non_negative, radio, at_most))]


def quantity_list(dimension: str, count: int, **kwargs: bool) -> typing.Any:
    """A list of exactly ``count`` quantities, e.g. ``["0 mm", "100 mm"]`` -> (0.0, 0.1)."""
    return typing.Annotated[tuple[float, ...], pydantic.BeforeValidator(
        _QuantityListParser(_QuantityParser(dimension, **_flags(kwargs)), count))]


def _flags(kwargs: dict[str, bool]) -> dict[str, bool]:
    return {"positive": kwargs.get("positive", False),
            "non_negative": kwargs.get("non_negative", False),
            "radio": kwargs.get("radio", False)}


@dataclass(frozen=True)
class _QuantityParser:
    dimension: str
    positive: bool = False
    non_negative: bool = False
    radio: bool = False
    at_most: str | None = None

    def __call__(self, value: Any) -> float:
        from bench import units  # leaf module; imported here to keep this module light

        word = units.dimension_word(self.dimension)
        if isinstance(value, (dict, list, tuple)):
            article = "an" if word[:1] in "aeiou" else "a"
            raise bench_error(f"expected {article} {word} like "
                              f"{units.DIMENSIONS[self.dimension]}, found {format_value(value)}")
        try:
            result = units.parse(value, self.dimension, radio=self.radio)
        except ConfigError as exc:
            raise bench_error(exc.message) from None
        if (self.positive and result <= 0) or (self.non_negative and result < 0):
            sign = "positive" if self.positive else "non-negative"
            raise bench_error(f"expected a {sign} {word}, found {format_value(value)}")
        if self.at_most is not None and result > units.parse(self.at_most, self.dimension):
            article = "an" if word[:1] in "aeiou" else "a"
            raise bench_error(f"expected {article} {word} of at most {self.at_most}, "
                              f"found {format_value(value)}")
        return result


@dataclass(frozen=True)
class _QuantityListParser:
    item: _QuantityParser
    count: int

    def __call__(self, value: Any) -> tuple[float, ...]:
        from bench import units

        example = units.DIMENSIONS[self.item.dimension]
        if not isinstance(value, (list, tuple)) or len(value) != self.count:
            raise bench_error(f"expected a list of {self.count} {self.item.dimension}s like "
                              f"[{', '.join([example] * self.count)}], found "
                              f"{format_value(value)}")
        return tuple(self.item(v) for v in value)
