"""Safe YAML loading that remembers where every value came from.

All of loopwright's YAML inputs (procedures, bench files, drivers, DUT models) go
through :func:`load_yaml` and :func:`validate`, so a bad input always ends in an
:class:`~loopwright.errors.InputError` that names the file, the line and the field.

- Only the safe YAML subset is read (no Python objects).
- Duplicate keys are an error (plain YAML keeps the last one silently).
- Alias expansion is bounded, so an alias bomb ends in an error, not in a full memory.
- Unknown keys are rejected by the pydantic models (``extra="forbid"``), and the error
  suggests the closest allowed key.
"""

from __future__ import annotations

import difflib
import types
import typing
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import yaml
from pydantic import BaseModel, ValidationError

from loopwright.errors import InputError

#: Most YAML nodes a file may expand to (aliases included) before it is refused.
MAX_NODES = 200_000
#: Largest file read, in bytes.
MAX_BYTES = 8 * 1024 * 1024

FieldPath = tuple[str | int, ...]
#: The only tags a mapping or a list may carry (the ones YAML gives them by default).
_PLAIN_TAGS = ("tag:yaml.org,2002:map", "tag:yaml.org,2002:seq")
ModelT = TypeVar("ModelT", bound=BaseModel)


@dataclass
class YamlSource:
    """Parsed YAML data with the line of every key and item.

    Attributes
    ----------
    path
        The file it came from (or a label such as ``<string>``).
    data
        Plain Python data: dicts, lists, str, int, float, bool, None.
    lines
        1-based line for each field path, e.g. ``("steps", 2, "start_hz") -> 14``.
    """

    path: str
    data: Any
    lines: dict[FieldPath, int] = field(default_factory=dict)

    def line_of(self, loc: FieldPath) -> int | None:
        """Line of ``loc`` or of its nearest parent that has one."""
        loc = tuple(loc)
        while loc:
            if loc in self.lines:
                return self.lines[loc]
            loc = loc[:-1]
        return self.lines.get((), None)

    def error(self, loc: FieldPath, message: str) -> InputError:
        """An :class:`InputError` pointing at ``loc`` in this file."""
        return InputError(message, path=self.path, line=self.line_of(loc),
                          field=format_loc(loc) or None)


def format_loc(loc: FieldPath) -> str:
    """``("steps", 2, "start_hz")`` -> ``steps[2].start_hz``."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


class _Builder:
    """Turns a composed YAML node tree into plain data plus a line map."""

    def __init__(self, path: str) -> None:
        self.path = path
        self.lines: dict[FieldPath, int] = {}
        self.count = 0
        self.constructor = yaml.SafeLoader("")

    def build(self, node: yaml.Node, loc: FieldPath) -> Any:
        self.count += 1
        if self.count > MAX_NODES:
            raise InputError(
                f"the YAML expands to more than {MAX_NODES} values (an alias bomb?);"
                " write the values out instead of nesting aliases",
                path=self.path, line=node.start_mark.line + 1, field=format_loc(loc) or None)
        self.lines.setdefault(loc, node.start_mark.line + 1)
        if isinstance(node, yaml.MappingNode | yaml.SequenceNode) and node.tag not in _PLAIN_TAGS:
            # e.g. !!python/object/apply on a list: refused, not read as a plain list
            raise InputError(f"the tag {node.tag!r} is not allowed; write plain YAML",
                             path=self.path, line=node.start_mark.line + 1,
                             field=format_loc(loc) or None)
        if isinstance(node, yaml.MappingNode):
            out: dict[str, Any] = {}
            for key_node, value_node in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    raise InputError("merge keys ('<<') are not supported; write the keys out",
                                     path=self.path, line=key_node.start_mark.line + 1)
                key = self.build_scalar(key_node, loc)
                if not isinstance(key, str):
                    key = str(key)
                if key in out:
                    raise InputError(
                        f"duplicate key {key!r} (first on line {self.lines[(*loc, key)]})",
                        path=self.path, line=key_node.start_mark.line + 1,
                        field=format_loc((*loc, key)))
                self.lines[(*loc, key)] = key_node.start_mark.line + 1
                out[key] = self.build(value_node, (*loc, key))
            return out
        if isinstance(node, yaml.SequenceNode):
            items = []
            for index, item in enumerate(node.value):
                self.lines[(*loc, index)] = item.start_mark.line + 1
                items.append(self.build(item, (*loc, index)))
            return items
        return self.build_scalar(node, loc)

    def build_scalar(self, node: yaml.Node, loc: FieldPath) -> Any:
        if not isinstance(node, yaml.ScalarNode):
            raise InputError("a key must be a plain word, not a list or mapping",
                             path=self.path, line=node.start_mark.line + 1,
                             field=format_loc(loc) or None)
        try:
            return self.constructor.construct_object(node, deep=True)
        except yaml.YAMLError as exc:
            problem = getattr(exc, "problem", None) or " ".join(str(exc).split())
            raise InputError(f"cannot read this value: {problem}", path=self.path,
                             line=node.start_mark.line + 1,
                             field=format_loc(loc) or None) from exc


def loads_yaml(text: str, path: str = "<string>") -> YamlSource:
    """Parse YAML text safely; see :func:`load_yaml`."""
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        problem = exc.problem or str(exc)
        raise InputError(f"not valid YAML: {problem}", path=path, line=line) from exc
    except yaml.reader.ReaderError as exc:
        # a control character YAML does not allow; its text spans several lines
        line = text[: exc.position].count("\n") + 1
        char = exc.character
        if not isinstance(char, int):
            char = ord(str(char)[:1] or "?")
        raise InputError(f"not valid YAML: character U+{char:04X} is not allowed in YAML text",
                         path=path, line=line) from exc
    except yaml.YAMLError as exc:
        raise InputError("not valid YAML: " + " ".join(str(exc).split()), path=path) from exc
    if node is None:
        raise InputError("the file is empty; see the commented examples in the docs",
                         path=path, line=1)
    builder = _Builder(path)
    data = builder.build(node, ())
    return YamlSource(path=path, data=data, lines=builder.lines)


def load_yaml(path: str | Path) -> YamlSource:
    """Read a YAML file safely and keep the line of every field.

    Parameters
    ----------
    path
        The file to read.

    Returns
    -------
    YamlSource
        The data and its line map.

    Raises
    ------
    InputError
        The file is missing, too large, empty, not UTF-8, not YAML, has a duplicate
        key or expands beyond :data:`MAX_NODES` values.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError as exc:
        raise InputError("file not found", path=path) from exc
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror}", path=path) from exc
    if len(raw) > MAX_BYTES:
        raise InputError(f"file is larger than {MAX_BYTES // 1024 // 1024} MiB", path=path)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError("not UTF-8 text", path=path, line=line) from exc
    return loads_yaml(text, str(path))


def _unwrap(annotation: Any) -> list[Any]:
    """The concrete types inside Optional/Union/Annotated/list/dict annotations."""
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _unwrap(typing.get_args(annotation)[0])
    if origin in (typing.Union, types.UnionType):
        out = []
        for arg in typing.get_args(annotation):
            out.extend(_unwrap(arg))
        return out
    return [annotation]


def _allowed_keys(model: type[BaseModel], loc: FieldPath) -> list[str]:
    """Field names allowed at the mapping that holds ``loc[-1]``."""
    candidates: list[Any] = [model]
    for part in loc[:-1]:
        nxt: list[Any] = []
        for cand in candidates:
            for typ in _unwrap(cand):
                if isinstance(typ, type) and issubclass(typ, BaseModel):
                    info = typ.model_fields.get(str(part))
                    if info is not None:
                        nxt.append(info.annotation)
                    else:
                        # a discriminated-union tag in the loc: stay on the same models
                        nxt.append(typ)
                elif typing.get_origin(typ) in (list, tuple, dict, Mapping):
                    args = typing.get_args(typ)
                    if args:
                        nxt.append(args[-1])
        candidates = nxt
    names: set[str] = set()
    for cand in candidates:
        for typ in _unwrap(cand):
            if isinstance(typ, type) and issubclass(typ, BaseModel):
                names.update(typ.model_fields)
    return sorted(names)


def _message(err: Mapping[str, Any], model: type[BaseModel], loc: FieldPath) -> str:
    kind = err.get("type", "")
    if kind == "extra_forbidden":
        allowed = _allowed_keys(model, loc)
        guess = difflib.get_close_matches(str(loc[-1]), allowed, n=1) if loc else []
        hint = f"; did you mean {guess[0]!r}?" if guess else ""
        listing = f" Allowed keys: {', '.join(allowed)}." if allowed else ""
        return f"unknown key{hint or ('.' if listing else '')}{listing}"
    if kind == "missing":
        return "required field is missing"
    msg = str(err.get("msg", "invalid value"))
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, "):]
    given = err.get("input")
    if kind not in ("missing",) and not isinstance(given, dict | list):
        shown = repr(given)
        if len(shown) > 60:
            shown = shown[:57] + "..."
        msg += f" (got {shown})"
    return msg


def validate(model: type[ModelT], source: YamlSource, loc: FieldPath = ()) -> ModelT:
    """Validate ``source.data`` (or the part at ``loc``) against a pydantic model.

    Parameters
    ----------
    model
        The pydantic model; models should forbid extra keys.
    source
        Data with its line map, from :func:`load_yaml`.
    loc
        Where in the data the model's mapping sits (``()`` = the whole file).

    Returns
    -------
    model instance

    Raises
    ------
    InputError
        For the first problem found, naming file, line and field; the text lists the
        allowed keys or values where that helps.
    """
    data = source.data
    for part in loc:
        data = data[part]
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        errors = exc.errors(include_url=False)
        # An unknown key is usually a typo of the missing one: report it first.
        errors.sort(key=lambda e: e.get("type") != "extra_forbidden")
        first = errors[0]
        err_loc: FieldPath = tuple(first.get("loc", ()))
        # pydantic puts union-member and tag names into loc: keep the data path only.
        clean: list[str | int] = []
        probe: Any = data
        for part in err_loc:
            in_dict = isinstance(probe, dict) and part in probe
            in_list = isinstance(probe, list) and isinstance(part, int) and part < len(probe)
            if in_dict or in_list:
                clean.append(part)
                probe = probe[part]
            elif first.get("type") in ("extra_forbidden", "missing") and part == err_loc[-1]:
                clean.append(part)
        full = (*loc, *clean)
        message = _message(first, model, tuple(clean))
        more = len(errors) - 1
        if more:
            message += f" (and {more} more problem{'s' if more > 1 else ''})"
        line = source.line_of(full)
        if first.get("type") == "missing":
            line = source.line_of(full[:-1])
        raise InputError(message, path=source.path, line=line,
                         field=format_loc(full) or None) from exc
