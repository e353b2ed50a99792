"""Strict JSON reading and one-line error messages for the file layer.

Shared by :mod:`fieldmix.layout` and :mod:`fieldmix.show` (and usable by any later
loader: cues, mappings, autosave). Everything a person can get wrong in a file ends
as one :class:`~fieldmix.errors.ConfigError` whose ``where`` is the file name plus a
JSON path (``ring8.json: speakers[3].azimuth``) and whose message is plain English,
never jsonschema's raw text and never a traceback.

Reading is stricter than :func:`json.loads`:

- the bytes must be UTF-8 (a byte-order mark is tolerated and skipped); a bad byte is
  reported with its byte offset, line and column;
- ``NaN``, ``Infinity`` and ``-Infinity`` (which Python's json accepts) are caught
  through ``parse_constant`` and reported at their JSON path, as are numbers too large
  for a float (``1e400`` would silently become infinity);
- a key given twice in one object is an error (json would keep the last one silently);
- absurd nesting and oversized files are refused instead of exhausting the stack or
  memory.
"""

from __future__ import annotations

import difflib
import json
import math
import os
import re
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any, Iterable, Sequence

from fieldmix.errors import ConfigError

MAX_FILE_BYTES = 32 * 1024 * 1024  # a layout or show is a few kB; refuse anything silly
MAX_DEPTH = 64  # legitimate files nest 4-6 levels deep

_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


# --------------------------------------------------------------------------- text

_ESCAPES = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def oneline(s: Any) -> str:
    """``s`` as text with every non-printable character escaped (messages stay one line)."""
    s = str(s)
    if s.isprintable():
        return s
    out = []
    for c in s:
        if c.isprintable():
            out.append(c)
        elif c in _ESCAPES:
            out.append(_ESCAPES[c])
        elif ord(c) <= 0xFFFF:
            out.append(f"\\u{ord(c):04x}")
        else:
            out.append(f"\\U{ord(c):08x}")
    return "".join(out)


def quote(s: Any, limit: int = 60) -> str:
    """``"text"`` for messages: one line, clipped to ``limit`` characters."""
    s = oneline(s).replace('"', '\\"')
    if len(s) > limit:
        s = s[: limit - 3] + "..."
    return f'"{s}"'


# --------------------------------------------------------------------------- paths


def format_path(parts: Iterable[Any]) -> str:
    """JSON path as a person reads it: ``speakers[3].azimuth``, ``direct["top.L"]``."""
    out = ""
    for p in parts:
        if isinstance(p, int) and not isinstance(p, bool):
            out += f"[{p}]"
        elif isinstance(p, str) and _IDENT.match(p):
            out += f".{p}" if out else p
        else:
            out += f"[{quote(p)}]"
    return out


def join_where(where: str, parts: Iterable[Any] = ()) -> str:
    """``where`` (a file name) plus a JSON path: ``ring8.json: speakers[3]``."""
    path = format_path(parts)
    if not path:
        return where
    if not where:
        return path
    return f"{where}: {path}"


def show_value(value: Any, limit: int = 40) -> str:
    """A short JSON-looking rendering of a value for error messages."""
    if isinstance(value, _NonFinite):
        return value.text
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    if isinstance(value, str):
        return quote(value, limit)
    try:
        text = json.dumps(value, ensure_ascii=False)
    except (TypeError, ValueError):
        text = repr(value)
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return text


def quoted_list(items: Sequence[Any], limit: int = 12, conj: str = "or") -> str:
    """``"a", "b" or "c"`` (at most ``limit`` items; ``conj`` joins the last two)."""
    shown = [quote(i) for i in items[:limit]]
    if len(items) > limit:
        shown.append("...")
    if len(shown) <= 1:
        return "".join(shown)
    return ", ".join(shown[:-1]) + f" {conj} " + shown[-1]


def did_you_mean(word: str, candidates: Iterable[str]) -> str:
    """`` (did you mean "azimuth"?)`` or an empty string."""
    close = difflib.get_close_matches(word, list(candidates), n=1, cutoff=0.6)
    return f' (did you mean "{close[0]}"?)' if close else ""


# --------------------------------------------------------------------------- reading


class _NonFinite:
    """What ``parse_constant`` returns for NaN / Infinity: reported later with its path."""

    __slots__ = ("text",)

    def __init__(self, text: str):
        self.text = text

    def __repr__(self) -> str:  # pragma: no cover - debugging aid
        return f"<{self.text}>"


class _DupDict(dict):
    """A JSON object in which some key was given more than once."""

    dupes: list


def _pairs_hook(pairs):
    d = {}
    dupes = []
    for k, v in pairs:
        if k in d and k not in dupes:
            dupes.append(k)
        d[k] = v
    if dupes:
        dd = _DupDict(d)
        dd.dupes = dupes
        return dd
    return d


def _line_col(text: str, index: int) -> tuple[int, int]:
    line = text.count("\n", 0, index) + 1
    col = index - (text.rfind("\n", 0, index) + 1) + 1
    return line, col


def decode_utf8(raw: bytes, where: str, lines_in_where: bool = False) -> str:
    """Decode UTF-8 strictly; a BOM is skipped. Errors name the byte offset.

    With ``lines_in_where`` the line number goes into ``where`` (``control.txt line 5``),
    as the script grammar reports places; otherwise into the message.
    """
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        good = raw[: exc.start].decode("utf-8", errors="replace")
        line, col = _line_col(good, len(good))
        bad = raw[exc.start : exc.start + 1].hex().upper()
        if lines_in_where:
            raise ConfigError(
                f"{where} line {line}",
                f"not UTF-8 text: invalid byte 0x{bad} at byte offset {exc.start} "
                f"(column {col}); save the file as UTF-8",
            ) from None
        raise ConfigError(
            where,
            f"not UTF-8 text: invalid byte 0x{bad} at byte offset {exc.start} "
            f"(line {line}, column {col}); save the file as UTF-8",
        ) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    return text


def read_bytes(path: Path, where: str, what: str = "file") -> bytes:
    """Read a whole file, turning every OS problem into one ConfigError line."""
    shown = oneline(path)
    try:
        if path.is_dir():
            raise ConfigError(where, f"{what} {shown} is a folder, not a file")
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise ConfigError(
                where, f"{what} is too large ({size} bytes; at most {MAX_FILE_BYTES})"
            )
        return path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(where, f"{what} not found: {shown}") from None
    except PermissionError:
        raise ConfigError(where, f"cannot read {what} {shown}: permission denied") from None
    except OSError as exc:
        raise ConfigError(where, f"cannot read {what} {shown}: {oneline(exc.strerror or exc)}") from None
    except ValueError as exc:  # e.g. a NUL character in the path
        raise ConfigError(where, f"cannot read {what}: {oneline(exc)}") from None


def parse_json_text(text: str, where: str) -> Any:
    """Parse JSON text; NaN/Infinity and duplicate keys are marked for :func:`check_plain`."""
    try:
        return json.loads(text, parse_constant=_NonFinite, object_pairs_hook=_pairs_hook)
    except json.JSONDecodeError as exc:
        msg = exc.msg[:1].lower() + exc.msg[1:]
        raise ConfigError(
            f"{where} line {exc.lineno} column {exc.colno}", f"not valid JSON: {msg}"
        ) from None
    except RecursionError:
        raise ConfigError(where, f"nested too deeply (more than {MAX_DEPTH} levels)") from None
    except ValueError as exc:  # e.g. an integer with thousands of digits
        raise ConfigError(where, f"not usable JSON: {oneline(str(exc).split(';')[0])}") from None


def read_json(path, where: str | None = None) -> Any:
    """Read a JSON file strictly and return plain data (checked by :func:`check_plain`)."""
    path = Path(path)
    where = where or oneline(path.name)
    raw = read_bytes(path, where)
    text = decode_utf8(raw, where)
    data = parse_json_text(text, where)
    check_plain(data, where)
    return data


def check_plain(data: Any, where: str) -> None:
    """Reject what JSON cannot hold or we do not accept, naming the JSON path.

    Non-finite numbers (NaN / Infinity literals, or a float that overflowed), keys given
    twice, non-string keys, values of other Python types, and nesting deeper than
    :data:`MAX_DEPTH`. Also used on dicts that did not come from a file.
    """
    stack: list[tuple[Any, tuple]] = [(data, ())]
    while stack:
        value, path = stack.pop()
        if len(path) > MAX_DEPTH:
            raise ConfigError(
                join_where(where, path[:MAX_DEPTH]),
                f"nested too deeply (more than {MAX_DEPTH} levels)",
            )
        if isinstance(value, _NonFinite):
            raise ConfigError(
                join_where(where, path),
                f"{value.text} is not allowed: numbers must be finite",
            )
        if isinstance(value, bool) or value is None or isinstance(value, (str, int)):
            continue
        if isinstance(value, float):
            if not math.isfinite(value):
                raise ConfigError(
                    join_where(where, path),
                    "number is not finite (too large, NaN or Infinity)",
                )
            continue
        if isinstance(value, dict):
            if isinstance(value, _DupDict):
                raise ConfigError(
                    join_where(where, path),
                    f"duplicate key {quote(value.dupes[0])}: each key may appear only once",
                )
            items = list(value.items())
            for k, _ in items:
                if not isinstance(k, str):
                    raise ConfigError(
                        join_where(where, path), f"object key {k!r} is not a string"
                    )
            for k, v in reversed(items):
                stack.append((v, path + (k,)))
            continue
        if isinstance(value, (list, tuple)):
            for i in range(len(value) - 1, -1, -1):
                stack.append((value[i], path + (i,)))
            continue
        raise ConfigError(
            join_where(where, path), f"unsupported value of type {type(value).__name__}"
        )


# --------------------------------------------------------------------------- schemas


@lru_cache(maxsize=None)
def load_schema(name: str) -> dict:
    """A schema shipped in ``fieldmix/schemas/`` (``"layout"`` -> layout.schema.json)."""
    text = resources.files("fieldmix").joinpath("schemas", f"{name}.schema.json").read_text(
        encoding="utf-8"
    )
    return json.loads(text)


@lru_cache(maxsize=None)
def _validator(name: str):
    from jsonschema import Draft202012Validator

    schema = load_schema(name)
    Draft202012Validator.check_schema(schema)
    return Draft202012Validator(schema)


_TYPE_WORDS = {
    "number": "a number",
    "integer": "an integer",
    "string": "a string",
    "boolean": "true or false",
    "object": "an object",
    "array": "a list",
    "null": "null",
}


def _fmt_num(x: Any) -> str:
    if isinstance(x, float) and x.is_integer() and abs(x) < 1e15:
        return str(int(x))
    return str(x)


def _template(schema: dict, keyword: str) -> str | None:
    msgs = schema.get("x-messages")
    if isinstance(msgs, dict):
        return msgs.get(keyword)
    return None


def schema_message(error) -> str:
    """Plain one-line text for one jsonschema ``ValidationError``."""
    kw = error.validator
    val = error.instance
    schema = error.schema if isinstance(error.schema, dict) else {}
    got = show_value(val)
    tmpl = _template(schema, kw)
    if tmpl:
        return tmpl.format(value=got, limit=_fmt_num(error.validator_value))

    if kw == "type":
        types = error.validator_value
        if isinstance(types, str):
            types = [types]
        words = [_TYPE_WORDS.get(t, t) for t in types]
        expected = words[0] if len(words) == 1 else ", ".join(words[:-1]) + " or " + words[-1]
        if isinstance(val, bool) and ("number" in types or "integer" in types):
            return f"expected {expected}, got {got} (true/false is not a number)"
        return f"expected {expected}, got {got}"
    if kw == "required":
        props = error.schema.get("properties", {}) if isinstance(error.schema, dict) else {}
        missing = [k for k in error.validator_value if isinstance(val, dict) and k not in val]
        key = missing[0] if missing else error.validator_value[0]
        hint = ""
        if isinstance(props.get(key), dict) and props[key].get("description"):
            hint = f" ({props[key]['description']})"
        return f'missing required key "{key}"{hint}'
    if kw == "additionalProperties":
        allowed = list(schema.get("properties", {}))
        extras = [k for k in val if k not in allowed] if isinstance(val, dict) else []
        if extras:
            k = extras[0]
            return f'unknown key {quote(k)}{did_you_mean(k, allowed)}; allowed keys: {", ".join(allowed)}'
        return "unknown key"
    if kw in ("minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum"):
        lo = schema.get("minimum", schema.get("exclusiveMinimum"))
        hi = schema.get("maximum", schema.get("exclusiveMaximum"))
        unit = schema.get("x-unit", "")
        unit = f" {unit}" if unit else ""
        if lo is not None and hi is not None:
            lo_word = "above" if "exclusiveMinimum" in schema else "from"
            hi_word = "below" if "exclusiveMaximum" in schema else "to"
            return (
                f"{got} is out of range: must be {lo_word} {_fmt_num(lo)} "
                f"{hi_word} {_fmt_num(hi)}{unit}"
            )
        if kw == "minimum":
            return f"{got} is too small: must be at least {_fmt_num(lo)}{unit}"
        if kw == "exclusiveMinimum":
            return f"{got} is too small: must be greater than {_fmt_num(lo)}{unit}"
        if kw == "maximum":
            return f"{got} is too large: must be at most {_fmt_num(hi)}{unit}"
        return f"{got} is too large: must be less than {_fmt_num(hi)}{unit}"
    if kw in ("minItems", "maxItems"):
        lo, hi = schema.get("minItems"), schema.get("maxItems")
        n = len(val) if isinstance(val, (list, tuple)) else "?"
        if lo is not None and hi is not None:
            want = f"{lo}" if lo == hi else f"{lo} to {hi}" if hi - lo > 1 else f"{lo} or {hi}"
            return f"expected {want} items, got {n}"
        if kw == "minItems":
            return f"expected at least {lo} items, got {n}"
        return f"expected at most {hi} items, got {n}"
    if kw == "minLength":
        return "must not be empty" if error.validator_value == 1 else (
            f"must be at least {error.validator_value} characters long"
        )
    if kw == "maxLength":
        return f"is too long: at most {error.validator_value} characters"
    if kw == "minProperties":
        return f"must have at least {error.validator_value} entries"
    if kw == "enum":
        choices = error.validator_value
        return f"{got} is not one of {quoted_list(choices)}{did_you_mean(str(val), map(str, choices))}"
    if kw == "const":
        return f"expected {show_value(error.validator_value)}, got {got}"
    if kw == "pattern":
        return f"{got} is not allowed here"
    return f"{got} is not valid here"


def validate(data: Any, schema_name: str, where: str) -> None:
    """Validate against a shipped schema; raise the best error as one ConfigError."""
    from jsonschema.exceptions import best_match

    err = best_match(_validator(schema_name).iter_errors(data))
    if err is None:
        return
    path = list(err.absolute_path)
    raise ConfigError(join_where(where, path), schema_message(err))


# --------------------------------------------------------------------------- writing


def write_atomic(path: Path, payload: bytes) -> None:
    """Write ``payload`` to ``path`` atomically: temp file in the same folder, fsync, rename."""
    path = Path(path)
    folder = path.parent
    folder.mkdir(parents=True, exist_ok=True)
    tmp = folder / f".{path.name}.{os.getpid()}-{os.urandom(4).hex()}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o644)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(payload)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    if hasattr(os, "O_DIRECTORY"):  # make the rename itself durable (POSIX)
        try:
            dfd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)
        except OSError:
            pass
