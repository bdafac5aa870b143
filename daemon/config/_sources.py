"""Where settings come from: the TOML file, the environment and the secrets directory (STYLE rule 24).

Each reader returns plain nested data; :func:`merge` lays the layers over one another, lowest
precedence first, and the root model validates the result once. The naming conventions are the ones
ionwarden documented while it loaded them with pydantic-settings (2.16), kept as they were:

* names are case-insensitive (lower-cased) and nest with ``__``: the variable
  ``IONWARDEN_MQTT__HOST`` and the secret file ``mqtt__host`` both give ``{"mqtt": {"host": …}}``;
* a value aimed at a complex key (a section, list, tuple, set or table) is JSON, e.g.
  ``IONWARDEN_STATIONS='[{"name": "base", "source": "stdin:"}]'``; deeper names win over the keys
  of such an object; any other value stays a string for pydantic to coerce;
* a name whose first part is no top-level key is ignored (other ``IONWARDEN_*`` variables, other
  systemd credentials such as ``ntrip_password.<station>``); an unknown key inside a section is
  kept, so validation reports it;
* a secret is its file's text with surrounding whitespace (the trailing newline) stripped; hidden
  files, sub-directories and links leading out of the directory are skipped; a missing directory
  holds no secrets.
"""

from __future__ import annotations

import json
import tomllib
import types
import typing
from collections import deque
from collections.abc import Mapping, Sequence, Set
from dataclasses import is_dataclass
from typing import TYPE_CHECKING, Any, Literal

from pydantic import BaseModel, Secret

from ionwarden.daemon.errors import ConfigError

if TYPE_CHECKING:
    from collections.abc import Iterable
    from pathlib import Path

__all__ = [
    "NESTED_DELIMITER",
    "SECRETS_MAX_BYTES",
    "merge",
    "read_env",
    "read_secrets",
    "read_toml",
]

NESTED_DELIMITER = "__"
#: Bound on the secret files read from one directory (pydantic-settings' default ``secrets_dir_max_size``).
SECRETS_MAX_BYTES = 16 * 2**20

# How a value aimed at a key is decoded: JSON that must parse, JSON if it parses, or kept as text.
_Decode = Literal["json", "json-or-text", "text"]
_COMPLEX = (BaseModel, Mapping, Sequence, Set, tuple, set, frozenset, deque)


def read_toml(path: Path) -> dict[str, Any]:
    """The TOML file as data; ConfigError naming the file when it is missing or malformed."""
    if not path.is_file():
        raise ConfigError(str(path), "no such file")
    try:
        with path.open("rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(path), f"invalid TOML: {exc}") from exc
    except OSError as exc:
        raise ConfigError(str(path), f"cannot read: {exc.strerror}") from exc


def read_env(model: type[BaseModel], environ: Mapping[str, str], prefix: str) -> dict[str, Any]:
    """The variables ``<prefix><KEY>[__<KEY>…]`` (any case) as nested data for ``model``."""
    low = prefix.lower()
    return _nest(
        model,
        (
            (name, name.lower().removeprefix(low), value)
            for name, value in environ.items()
            if name.lower().startswith(low)
        ),
    )


def read_secrets(model: type[BaseModel], directory: Path | None) -> dict[str, Any]:
    """One file per key in ``directory`` (e.g. ``mqtt__password``) as nested data for ``model``."""
    if directory is None:
        return {}
    root = directory.expanduser().resolve()
    if not root.exists():
        return {}
    if not root.is_dir():
        raise ConfigError(str(directory), "the secrets directory is not a directory")
    tops = {name.lower() for name in model.model_fields}
    entries: list[tuple[str, str, str]] = []
    total = 0
    try:
        listing = sorted(root.iterdir())
    except OSError as exc:
        raise ConfigError(str(directory), f"cannot read: {exc.strerror}") from exc
    for entry in listing:
        key = entry.name.lower()
        if entry.name.startswith(".") or key.split(NESTED_DELIMITER, 1)[0] not in tops:
            continue  # not ours, e.g. the credential ntrip_password.<station>
        try:
            target = entry.resolve()
            if root not in target.parents or not target.is_file():
                continue
            total += target.stat().st_size
            if total > SECRETS_MAX_BYTES:
                raise ConfigError(str(directory), f"secrets exceed {SECRETS_MAX_BYTES} bytes")
            text = target.read_text(encoding="utf-8")
        except RuntimeError:  # a link loop (Python < 3.13 raises it from resolve)
            continue
        except OSError as exc:
            raise ConfigError(str(entry), f"cannot read: {exc.strerror}") from exc
        except UnicodeDecodeError as exc:
            raise ConfigError(str(entry), "not UTF-8 text") from exc
        entries.append((str(entry), key, text.strip()))
    return _nest(model, entries)


def merge(*layers: Mapping[str, Any]) -> dict[str, Any]:
    """Later layers over earlier ones; tables merge key by key, anything else is replaced."""
    out: dict[str, Any] = {}
    for layer in layers:
        for key, value in layer.items():
            old = out.get(key)
            out[key] = (
                merge(old, value) if isinstance(old, dict) and isinstance(value, dict) else value
            )
    return out


def _nest(model: type[BaseModel], entries: Iterable[tuple[str, str, str]]) -> dict[str, Any]:
    """``(origin, lower-case key path, text)`` entries as nested data; origin names JSON errors."""
    fields = {name.lower(): name for name in model.model_fields}
    paths = [
        (parts, origin, text)
        for origin, key, text in entries
        if (parts := key.split(NESTED_DELIMITER))[0] in fields
    ]
    paths.sort(key=lambda p: len(p[0]))  # stable: shallow first, so deeper names override
    out: dict[str, Any] = {}
    for parts, origin, text in paths:
        value = _decode(origin, text, _decoding(model, parts))
        parts[0] = fields[parts[0]]
        node: Any = out
        for part in parts[:-1]:
            node = node.setdefault(part, {})
            if not isinstance(node, dict):
                break  # a shallower name gave a scalar or a list here: it stands
        else:
            old = node.get(parts[-1])
            both = isinstance(old, dict) and isinstance(value, dict)
            node[parts[-1]] = merge(old, value) if both else value
    return out


def _decode(origin: str, text: str, how: _Decode) -> Any:
    if how == "text":
        return text
    try:
        return json.loads(text)
    except ValueError as exc:
        if how == "json-or-text":
            return text
        raise ConfigError(origin, f"invalid JSON ({exc})") from exc


def _decoding(model: type[BaseModel], parts: list[str]) -> _Decode:
    """How to decode a value for the key path ``parts`` under ``model``."""
    node: tuple[Any, bool] | None = (model, True)
    for part in parts:
        node = _child(node[0], part) if node is not None else None
    if node is None:
        return "text"  # unknown key: validation names it
    annotation, is_field = node
    if _is_complex(annotation):
        return "json" if is_field else "json-or-text"  # a table's values may be plain text
    if _is_union(annotation) and any(_is_complex(a) for a in typing.get_args(annotation)):
        return "json-or-text"  # e.g. tuple[float, float, float] | None
    return "text"


def _child(annotation: Any, key: str) -> tuple[Any, bool] | None:
    """The type under ``key`` (any case) and whether it is a model field (else a table value)."""
    if typing.get_origin(annotation) is typing.Annotated:
        annotation = typing.get_args(annotation)[0]
    if typing.get_origin(annotation) is dict:
        args = typing.get_args(annotation)
        return (args[-1], False) if args else None
    for arg in typing.get_args(annotation):  # union members, list items
        found = _child(arg, key)
        if found is not None:
            return found
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        for name, field in annotation.model_fields.items():
            if name.lower() == key:
                return field.annotation, True
    return None


def _is_union(annotation: Any) -> bool:
    return typing.get_origin(annotation) in (typing.Union, types.UnionType)


def _is_complex(annotation: Any) -> bool:
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _is_complex(typing.get_args(annotation)[0])
    return any(
        isinstance(cls, type)
        and not issubclass(cls, (str, bytes, Secret))
        and (issubclass(cls, _COMPLEX) or is_dataclass(cls))
        for cls in (annotation, origin)
    )
