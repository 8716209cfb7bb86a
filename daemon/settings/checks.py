"""The base of every config table's model: pydantic models that report every problem at once.

A table's model subclasses :class:`Table` and declares its keys as fields: the type says what a
value may be, ``Field`` its default, its bounds and its TOML key (``validation_alias``) where that
differs from the attribute.  Rules across keys go in :meth:`Table.check`.

Loaded from a file, a table is validated with a :class:`Checks` as pydantic's validation context,
and then it never raises: each problem is recorded as ``FILE:LINE: key: problem``, and the value
becomes the field's default (None when it has none), so the rules across keys still run and the
whole file is judged in one pass.  Such a stand-in never leaves the loader, which raises
:class:`~thermeta.storage.errors.ConfigError` when any problem was found.  Built directly in code
(tests, benches) a model validates as any pydantic model does and raises on a bad value.

Python's ``tomllib`` keeps no line numbers: :class:`LineIndex` finds each table and key in the
raw text.
"""

from __future__ import annotations

import difflib
import os
import re
import typing
from collections.abc import Iterable
from typing import Annotated, Any, ClassVar, Literal, Self

from pydantic import (
    AfterValidator,
    AllowInfNan,
    BaseModel,
    ConfigDict,
    Field,
    Strict,
    ValidationError,
    ValidationInfo,
    ValidatorFunctionWrapHandler,
    field_validator,
    model_validator,
)
from pydantic_core import ErrorDetails, PydanticCustomError

# A required key the file does not give: its field is validated to None (see Table).
_MISSING = object()


def show(v: Any) -> str:
    """A TOML value as the file spells it, for messages."""
    if isinstance(v, str):
        return f'"{v}"'
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, list):
        return "a list"
    return str(v)


def problem(text: str) -> PydanticCustomError:
    """A value's problem in our own words (raised by a field's validator)."""
    return PydanticCustomError("thermeta", "{problem}", {"problem": text})


def _not_blank(v: str) -> str:
    if not v.strip():
        raise problem("must not be empty")
    return v


ENV_NAME_RE = re.compile(r"[A-Z_][A-Z0-9_]*")


def env_problem(name: str) -> str | None:
    """Why ``name`` (a key such as ``password_env``) names no set environment variable, or None.
    A value that does not look like a variable's name (upper-case letters, digits, _) may be the
    secret itself, typed in by mistake: it is not repeated."""
    if name in os.environ:
        return None
    if not ENV_NAME_RE.fullmatch(name):
        return (
            "must name an environment variable such as SECRET_MQTT_PASSWORD; the value given "
            "is not set and looks like it may be a secret itself, so it is not shown"
        )
    return f"environment variable {name} is not set"


def _env_is_set(name: str) -> str:
    why = env_problem(name)
    if why is not None:
        raise problem(why)
    return name


# The value types of the config's keys (TOML gives str, int, float, bool, lists and tables).
Int = Annotated[int, Strict()]
Num = Annotated[float, Strict(), AllowInfNan(False)]  # an int or a float, finite
Bool = Annotated[bool, Strict()]
Text = Annotated[str, Strict(), AfterValidator(_not_blank)]
Texts = tuple[Annotated[str, Strict()], ...]  # a list of strings
EnvName = Annotated[Text, AfterValidator(_env_is_set)]  # names a variable that must be set
Positive = Annotated[Num, Field(gt=0)]
NonNegative = Annotated[Num, Field(ge=0)]
PositiveInt = Annotated[Int, Field(gt=0)]


class LineIndex:
    """Where each table and key of a TOML text starts: path tuple -> line number (1-based).

    Paths look like ("broker", "port") or ("item", 2, "threshold") for array-of-tables entries.
    """

    HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
    KEY = re.compile(r"""^\s*([A-Za-z0-9_\-."' ]+?)\s*=""")

    def __init__(self, text: str):
        self.lines: dict[tuple[str | int, ...], int] = {}
        counts: dict[str, int] = {}
        table: tuple[str | int, ...] = ()
        in_multiline: str | None = None
        for no, line in enumerate(text.splitlines(), start=1):
            if in_multiline:
                if line.count(in_multiline) % 2 == 1:
                    in_multiline = None
                continue
            m = self.HEADER.match(line)
            if m:
                name = m.group(2).strip().strip('"')
                if m.group(1) == "[[":
                    counts[name] = counts.get(name, -1) + 1
                    table = (name, counts[name])
                else:
                    table = tuple(name.split("."))
                self.lines.setdefault(table, no)
                continue
            m = self.KEY.match(line)
            if m:
                key = tuple(p.strip().strip('"').strip("'") for p in m.group(1).split("."))
                self.lines.setdefault(table + key, no)
                for q in ('"""', "'''"):
                    if line.count(q) % 2 == 1:
                        in_multiline = q

    def line(self, path: tuple[str | int, ...]) -> int:
        p = tuple(path)
        while p:
            if p in self.lines:
                return self.lines[p]
            p = p[:-1]
        return 1


class Checks:
    """The problems found in one config file, each as ``FILE:LINE: key: problem``.

    :meth:`table` says which table is being read (("broker",), ("item", 2) ...): keys of problems
    are labelled and lined from it.  Without a file (``path`` None) the models are being built
    in code, and the problems are told as ``key: problem``.
    """

    def __init__(self, path: str | None = None, text: str = ""):
        self.path = path
        self.index = LineIndex(text)
        self.problems: list[str] = []
        self.where: tuple[str | int, ...] = ()
        self._mark = 0
        self._seen: dict[str, dict[str, int]] = {}

    def table(self, *where: str | int) -> Checks:
        self.where, self._mark = where, len(self.problems)
        return self

    @property
    def clean(self) -> bool:
        """No problem found in the current table so far."""
        return len(self.problems) == self._mark

    def line(self, *keys: str) -> int:
        return self.index.line(self.where + keys)

    def add(self, key: str, text: str, *, at: tuple[str | int, ...] | None = None) -> None:
        """A problem with ``key`` of the current table, told at the line of ``at`` (keys below
        the table; default the key itself, else the table's line)."""
        label = ".".join([*(p for p in self.where if isinstance(p, str)), key])
        if self.path is None:
            self.problems.append(f"{label}: {text}")
        else:
            line = self.index.line(self.where + (at if at is not None else (key,)))
            self.problems.append(f"{self.path}:{line}: {label}: {text}")

    def unknown(self, key: str, allowed: Iterable[str]) -> None:
        hits = difflib.get_close_matches(key, sorted(allowed), n=1, cutoff=0.75)
        self.add(key, "unknown key" + (f" (did you mean '{hits[0]}'?)" if hits else ""))

    def first_use(self, kind: str, key: str, value: str, hint: str = "") -> None:
        """``value`` of ``key`` must be unique across the file's tables: a second use is a
        problem naming the line of the first (and ``hint``, what to do instead)."""
        seen = self._seen.setdefault(kind, {})
        if value in seen:
            self.add(
                key,
                f"already used by the item on line {seen[value]}" + (f": {hint}" if hint else ""),
            )
        else:
            seen[value] = self.line(key)


def choices_of(annotation: Any) -> tuple[Any, ...] | None:
    """The values of a ``Literal`` annotation (also inside ``X | None``), else None."""
    if typing.get_origin(annotation) is Literal:
        return typing.get_args(annotation)
    for arg in typing.get_args(annotation):
        found = choices_of(arg)
        if found is not None:
            return found
    return None


def choice_problem(value: Any, choices: tuple[Any, ...]) -> str | None:
    """Why ``value`` is not one of ``choices`` (None when it is); a value of the wrong type is
    told as such first."""
    if all(isinstance(c, str) for c in choices):
        if not isinstance(value, str):
            return f"must be a string, got {show(value)}"
        if not value.strip():
            return "must not be empty"
    elif isinstance(value, bool) or not isinstance(value, int):
        return f"must be an integer, got {show(value)}"
    if value not in choices:
        return f"must be one of {', '.join(map(str, choices))}, got {show(value)}"
    return None


def wording(error: ErrorDetails, value: Any) -> str:
    """A pydantic error on a key's ``value`` as the config's messages say it."""
    kind, ctx = error["type"], error.get("ctx", {})
    if error["loc"] or kind in ("list_type", "tuple_type"):
        return f"must be a list of strings, got {show(value)}"
    want = {
        "int_type": "an integer",
        "float_type": "a number",
        "bool_type": "true or false",
        "string_type": "a string",
    }.get(kind)
    if want:
        return f"must be {want}, got {show(value)}"
    if kind == "finite_number":
        return f"must be a finite number, got {value}"
    if kind == "greater_than":
        return f"must be > {ctx['gt']:g}, got {value}"
    if kind == "greater_than_equal":
        return f"must be >= {ctx['ge']:g}, got {value}"
    return error["msg"]  # our own words (problem())


class Table(BaseModel):
    """A config table: its keys are the fields (see the module docstring)."""

    model_config = ConfigDict(frozen=True, extra="ignore", validate_by_name=True)
    # keys a file may not hold, though the model has them (a secret's value), and why
    refused: ClassVar[dict[str, str]] = {}

    @classmethod
    def toml_keys(cls) -> dict[str, str]:
        """TOML key -> field name."""
        return {
            (f.validation_alias if isinstance(f.validation_alias, str) else name): name
            for name, f in cls.model_fields.items()
        }

    @model_validator(mode="before")
    @classmethod
    def _keys(cls, data: Any, info: ValidationInfo) -> Any:
        checks = info.context
        if not isinstance(checks, Checks) or checks.path is None or not isinstance(data, dict):
            return data
        keys = cls.toml_keys()
        out = {}
        for key, value in data.items():
            if key in cls.refused:
                checks.add(key, cls.refused[key])
            elif key in keys:
                out[key] = value
            else:
                checks.unknown(key, keys)
        for key, name in keys.items():
            if key not in out and cls.model_fields[name].is_required():
                checks.add(key, "missing (required)", at=())
                out[key] = _MISSING
        return out

    @field_validator("*", mode="wrap")
    @classmethod
    def _lenient(
        cls, value: Any, handler: ValidatorFunctionWrapHandler, info: ValidationInfo
    ) -> Any:
        checks = info.context if isinstance(info.context, Checks) else None
        if value is _MISSING:
            return None
        name = str(info.field_name)  # always set for a field's validator
        field = cls.model_fields[name]
        choices = choices_of(field.annotation)
        why = None if choices is None else choice_problem(value, choices)
        if why is None:
            try:
                return handler(value)
            except ValidationError as exc:
                if checks is None or checks.path is None:
                    raise
                why = wording(exc.errors()[0], value)
        if checks is None or checks.path is None:
            raise ValueError(why)
        key = field.validation_alias if isinstance(field.validation_alias, str) else None
        checks.add(key or name, why)
        if field.is_required():
            return None
        return field.get_default(call_default_factory=True, validated_data=info.data)

    @model_validator(mode="after")
    def _across(self, info: ValidationInfo) -> Self:
        if isinstance(info.context, Checks):
            self.check(info.context)
            return self
        checks = Checks()
        self.check(checks)
        if checks.problems:
            raise ValueError("; ".join(checks.problems))
        return self

    def check(self, checks: Checks) -> None:
        """Rules across keys: record each broken one with ``checks.add``."""
