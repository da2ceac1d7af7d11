"""The policy file: which columns form the design, the limits, and the waivers.

A policy is YAML read with a ``yaml.SafeLoader`` subclass (the only YAML loading in the project)
into frozen pydantic models that reject unknown keys. Every error names the file, the key path,
the line (where YAML knows it) and what is allowed; echoed values go through
:func:`gate.errors.shown` (capped, control characters escaped).

The reader is stricter than plain ``yaml.safe_load``:

* scalars resolve by the YAML 1.2 core schema: only ``true``/``false`` are booleans, so ``off``,
  ``no``, ``yes`` and ``on`` are text, and ``1:30`` is text, not the YAML 1.1 base-60 number 90;
  dates (``2027-06-30``) are read as dates for ``expires``;
* a key given twice in one mapping is refused, naming both lines;
* aliases (``*name``) and merge keys (``<<``) are refused, so a small file cannot expand into a
  large one; the file is at most :data:`MAX_POLICY_BYTES` and nests at most :data:`MAX_DEPTH`
  levels; integers have at most :data:`MAX_INT_DIGITS` digits;
* numbers must be finite and are never booleans (``policy_version: true`` is refused).

A loaded policy is deeply immutable: lists become tuples and the one mapping
(``columns.reference``) a read-only dict, so what was checked is what the file says.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
import stat
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, ClassVar, Literal, NoReturn

import yaml
from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    field_validator,
)
from pydantic_core import PydanticCustomError

from gate.errors import PolicyError, shown


def _yaml_off(value: Any) -> Any:
    """``level: false`` (and a bare ``off`` from other YAML 1.1 readers) means the level "off"."""
    return "off" if value is False else value


def _not_bool(value: Any) -> Any:
    """Numbers are never booleans (pydantic would read ``true`` as 1)."""
    if isinstance(value, bool):
        raise PydanticCustomError("number_not_bool",
                                  "Input should be a number, not true or false")
    return value


def _one_or_many(value: Any) -> Any:
    """A single column name stands for a list of one."""
    return [value] if isinstance(value, str) else value


def _level_text(value: Any) -> Any:
    """Levels are compared as text; a YAML number (``axle_count: 2``) means the level '2'."""
    if isinstance(value, dict):
        return {k: str(v) if isinstance(v, int | float) and not isinstance(v, bool) else v
                for k, v in value.items()}
    return value


class FrozenDict(dict[str, str]):
    """A dict that refuses changes (the policy's mappings; still a dict for JSON and pydantic)."""

    def _refuse(self, *args: Any, **kwargs: Any) -> NoReturn:
        raise TypeError("a loaded policy is read-only; build a new one with "
                        "Policy.model_validate")

    __setitem__ = __delitem__ = clear = pop = popitem = setdefault = update = _refuse
    __ior__ = _refuse

    def __hash__(self) -> int:  # type: ignore[override]
        return hash(tuple(sorted(self.items())))

    def __reduce__(self) -> tuple[Any, ...]:
        return (FrozenDict, (dict(self),))


Level = Annotated[Literal["fail", "warn", "off"], BeforeValidator(_yaml_off)]
Real = Annotated[float, BeforeValidator(_not_bool)]
Count = Annotated[int, BeforeValidator(_not_bool)]
Names = Annotated[tuple[str, ...], BeforeValidator(_one_or_many)]
LevelMap = Annotated[dict[str, str], BeforeValidator(_level_text), AfterValidator(FrozenDict)]

#: Default of ``columns.max_levels``: a text column with more distinct values is refused as
#: identifier-like rather than one-hot encoded (common practice, no source).
DEFAULT_MAX_LEVELS = 50
#: Ceiling of ``columns.max_levels`` (the levels pass keeps at most this many values a column).
MAX_LEVELS_CEILING = 100_000
RuleName = Literal["pairwise_correlation", "vif", "condition_number", "rank_deficiency"]
RULES: tuple[str, ...] = ("pairwise_correlation", "vif", "condition_number", "rank_deficiency")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


class ColumnSelection(_Strict):
    """Which table columns become design columns, and how."""

    include: Names = Field(default=("*",), description="Shell-style globs.")
    exclude: Names = Field(default=(), description="Shell-style globs, applied last.")
    categorical: Names = Field(
        default=(),
        description="Columns one-hot encoded, one group each (string columns are anyway).",
    )
    weight: str | None = Field(default=None, description="Column of non-negative row weights.")
    target: Names = Field(
        default=(),
        description="Target column(s) of the model: never features; named in the verdict.",
    )
    reference: LevelMap = Field(
        default_factory=FrozenDict,
        description="Reference level per categorical column (default: its most frequent level "
                    "among the used rows; ties go to the first in sort order).",
    )
    max_levels: Count = Field(
        default=DEFAULT_MAX_LEVELS, ge=2, le=MAX_LEVELS_CEILING,
        description="A categorical column with more levels is refused (a text column that is "
                    "not listed in categorical is called identifier-like).",
    )


class CorrelationLimit(_Strict):
    max: Real = Field(default=0.8, gt=0, le=1, description="|r| >= max breaches.")
    level: Level = "warn"
    method: Literal["pearson"] = "pearson"


class VifLimit(_Strict):
    max: Real = Field(default=5.0, gt=1, description="VIF > max breaches; groups use GVIF^(1/df).")
    level: Level = "fail"


class ConditionLimit(_Strict):
    max: Real = Field(default=30.0, gt=1, description="Condition index > max breaches.")
    level: Level = "warn"
    scaling: Literal["unit_length", "standardized"] = "unit_length"
    proportion: Real = Field(
        default=0.5, gt=0, le=1,
        description="Variance-decomposition proportion at which a feature counts as involved.",
    )


class RankLimit(_Strict):
    level: Level = "fail"
    tolerance: Real | None = Field(
        default=None, gt=0, lt=1,
        description="Relative singular-value tolerance; default max(n, p+1) * eps.",
    )


class Limits(_Strict):
    pairwise_correlation: CorrelationLimit = Field(default_factory=CorrelationLimit)
    vif: VifLimit = Field(default_factory=VifLimit)
    condition_number: ConditionLimit = Field(default_factory=ConditionLimit)
    rank_deficiency: RankLimit = Field(default_factory=RankLimit)


class Waiver(_Strict):
    """Accepts the findings of one rule over a set of features until a date."""

    rule: RuleName
    features: tuple[str, ...] = Field(min_length=1)
    reason: str = Field(min_length=1)
    owner: str = Field(min_length=1)
    expires: dt.date

    @field_validator("reason", "owner")
    @classmethod
    def _not_blank(cls, value: str) -> str:
        if not value.strip():
            raise ValueError("must not be blank")
        return value


class Segments(_Strict):
    """Run the whole gate per segment (e.g. per region or month) as well as on the whole table.

    The ``by`` columns are excluded from the features automatically. Segments with fewer than
    ``min_rows`` used rows are reported but not judged (too few rows to estimate p x p
    correlations; 30 is common practice, no source).
    """

    by: tuple[str, ...] = Field(min_length=1, description="Columns whose value combinations "
                                "form the segments.")
    min_rows: Count = Field(default=30, ge=2, description="Segments with fewer used rows are "
                          "reported, not judged.")


class Policy(_Strict):
    """A validated policy. Build it with :func:`load_policy` or ``Policy.model_validate``."""

    policy_version: Annotated[Literal[1], BeforeValidator(_not_bool)] = 1
    name: str = Field(min_length=1)
    description: str = ""
    columns: ColumnSelection = Field(default_factory=ColumnSelection)
    missing: Literal["drop_rows", "fail"] = "drop_rows"
    limits: Limits = Field(default_factory=Limits)
    waivers: tuple[Waiver, ...] = ()
    segments: Segments | None = None

    _source: str | None = PrivateAttr(default=None)
    _sha256: str | None = PrivateAttr(default=None)

    @property
    def source(self) -> str | None:
        """Path of the file the policy came from (None when built in code)."""
        return self._source

    @property
    def sha256(self) -> str:
        """sha256 of the policy file's bytes, or of its canonical JSON when built in code."""
        if self._sha256 is not None:
            return self._sha256
        return self.effective_sha256

    @property
    def effective_sha256(self) -> str:
        """sha256 of the policy as checked: its canonical JSON (every key, defaults included,
        sorted; compact separators; UTF-8). Two files that differ only in comments, layout or
        spelled-out defaults share it; any change to what is enforced changes it."""
        canonical = json.dumps(self.model_dump(mode="json"), sort_keys=True,
                               separators=(",", ":"), ensure_ascii=False, allow_nan=False)
        return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


DEFAULT_POLICY = "default.yaml"
#: Largest policy file read (policies are a few kB; this bounds the reading work).
MAX_POLICY_BYTES = 1 << 20
#: Deepest nesting of mappings and lists (a policy needs 4).
MAX_DEPTH = 32
#: Longest integer, in digits (Python refuses to parse beyond 4,300; limits need a handful).
MAX_INT_DIGITS = 30


def packaged_policy_path(name: str = DEFAULT_POLICY) -> Path:
    """Path of a policy shipped with the package (``default.yaml``, ``exploratory.yaml``)."""
    return Path(str(resources.files("gate.policies").joinpath(name)))


def load_policy(path: str | Path | None = None) -> Policy:
    """Read and validate a policy file; ``None`` loads the packaged default policy."""
    file = packaged_policy_path() if path is None else Path(path)
    where = shown(str(file))
    try:
        # O_NONBLOCK: opening a FIFO nobody writes to must not hang; it is refused below.
        fd = os.open(file, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        with os.fdopen(fd, "rb") as handle:
            if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
                raise PolicyError(f"{where}: not a regular file; give the path of a policy "
                                  "YAML file")
            raw = handle.read(MAX_POLICY_BYTES + 1)
    except FileNotFoundError:
        raise PolicyError(f"{where}: policy file not found; check the path or omit --policy "
                          "to use the packaged default") from None
    except IsADirectoryError:
        raise PolicyError(f"{where}: is a folder; give the path of a policy YAML file") from None
    except OSError as exc:
        raise PolicyError(f"{where}: cannot read policy file ({exc.strerror})") from None
    return parse_policy(raw, source=str(file))


def parse_policy(raw: bytes | str, *, source: str = "<policy>") -> Policy:
    """Validate policy YAML text; ``source`` names it in error messages."""
    data = raw if isinstance(raw, bytes) else raw.encode()
    source = shown(source)
    if len(data) > MAX_POLICY_BYTES:
        raise PolicyError(f"{source}: policy file is larger than {MAX_POLICY_BYTES:,} bytes; "
                          "a policy is a few kB of YAML: check that this is the policy file")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise PolicyError(f"{source}: policy file is not UTF-8 text; convert it, e.g. "
                          "`iconv -f latin1 -t utf-8`") from None
    try:
        content = _load_yaml(text, source)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f": line {mark.line + 1}" if mark is not None else ""
        problem = getattr(exc, "problem", None) or "invalid YAML"
        if isinstance(exc, _Refused):
            raise PolicyError(f"{source}{where}: {problem}") from None
        raise PolicyError(f"{source}{where}: not valid YAML ({shown(problem)}); fix the "
                          "syntax") from None
    if not isinstance(content, dict):
        raise PolicyError(f"{source}: a policy must be a YAML mapping with at least "
                          "'policy_version: 1' and 'name'")
    try:
        policy = Policy.model_validate(content)
    except ValidationError as exc:
        raise PolicyError(_describe_validation_error(exc, text, source)) from None
    policy._source = source
    policy._sha256 = hashlib.sha256(data).hexdigest()
    return policy


# --- the YAML reader ----------------------------------------------------------------------------

class _Refused(yaml.MarkedYAMLError):  # type: ignore[misc]
    """Valid YAML this reader refuses (aliases, deep nesting, huge integers)."""

    def __init__(self, problem: str, mark: yaml.Mark) -> None:
        super().__init__(None, None, problem, mark)


class _PolicyLoader(yaml.SafeLoader):  # type: ignore[misc]
    """SafeLoader with YAML 1.2 core scalars, no aliases or merge keys, and bounded depth."""

    yaml_implicit_resolvers: ClassVar[dict[Any, Any]] = {}
    _depth = 0

    def compose_node(self, parent: yaml.Node | None, index: Any) -> yaml.Node | None:
        if self.check_event(yaml.AliasEvent):
            event = self.peek_event()
            raise _Refused("aliases (*name) are not allowed in a policy; write the value out",
                           event.start_mark)
        self._depth += 1
        try:
            if self._depth > MAX_DEPTH:
                raise _Refused(f"nested deeper than {MAX_DEPTH} levels, which no policy key "
                               "needs; check the brackets and indentation",
                               self.peek_event().start_mark)
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


def _resolver(tag: str, pattern: str, first: str | list[str]) -> None:
    _PolicyLoader.add_implicit_resolver(f"tag:yaml.org,2002:{tag}", re.compile(pattern),
                                        list(first))


# YAML 1.2 core schema (https://yaml.org/spec/1.2.2/#1032-tag-resolution), plus dates.
_resolver("bool", r"^(?:true|True|TRUE|false|False|FALSE)$", "tTfF")
_resolver("int", r"^(?:[-+]?[0-9]+|0o[0-7]+|0x[0-9a-fA-F]+)$", "-+0123456789")
_resolver("float", r"^(?:[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?"
          r"|[-+]?\.(?:inf|Inf|INF)|\.(?:nan|NaN|NAN))$", "-+0123456789.")
_resolver("null", r"^(?:~|null|Null|NULL|)$", ["~", "n", "N", ""])
_resolver("timestamp", r"^[0-9][0-9][0-9][0-9]-[0-9][0-9]?-[0-9][0-9]?$", "0123456789")


def _construct_int(loader: yaml.SafeLoader, node: yaml.ScalarNode) -> int:
    text = str(loader.construct_scalar(node))
    digits = text.lstrip("+-")
    if len(digits) > MAX_INT_DIGITS:
        raise _Refused(f"an integer of {len(digits):,} digits is refused (at most "
                       f"{MAX_INT_DIGITS}); no policy key needs more", node.start_mark)
    base = {"0o": 8, "0x": 16}.get(digits[:2], 10)
    value = int(digits[2:] if base != 10 else digits, base)
    return -value if text.startswith("-") else value


def _construct_date(loader: yaml.SafeLoader, node: yaml.ScalarNode) -> Any:
    """A date; text when it is no calendar date (2027-13-45), so validation names the key."""
    try:
        return loader.construct_yaml_timestamp(node)
    except ValueError:
        return loader.construct_scalar(node)


_PolicyLoader.add_constructor("tag:yaml.org,2002:int", _construct_int)
_PolicyLoader.add_constructor("tag:yaml.org,2002:timestamp", _construct_date)


def _load_yaml(text: str, source: str) -> Any:
    loader = _PolicyLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        _refuse_duplicate_keys(node, source)
        return loader.construct_document(node)
    finally:
        loader.dispose()


def _refuse_duplicate_keys(root: yaml.Node, source: str) -> None:
    """A key given twice in one mapping (YAML readers keep the last one silently)."""
    stack: list[tuple[yaml.Node, tuple[Any, ...]]] = [(root, ())]
    while stack:
        node, path = stack.pop()
        if isinstance(node, yaml.MappingNode):
            first: dict[tuple[str, str], yaml.Node] = {}
            for key, value in node.value:
                if isinstance(key, yaml.ScalarNode):
                    seen = first.setdefault((key.tag, key.value), key)
                    if seen is not key:
                        raise PolicyError(
                            f"{source}: line {key.start_mark.line + 1}: "
                            f"{_key_path((*path, shown(key.value)))}: duplicate key (first given "
                            f"on line {seen.start_mark.line + 1}); keep one of the two")
                    stack.append((value, (*path, shown(key.value))))
        elif isinstance(node, yaml.SequenceNode):
            stack.extend((item, (*path, k)) for k, item in enumerate(node.value))


_YAML11_BOOL = re.compile(r"^(?:y|Y|yes|Yes|YES|n|N|no|No|NO|on|On|ON|off|Off|OFF)$")
_YAML11_NUMBER = re.compile(r"^[-+]?(?:[0-9][0-9_]*(?::[0-5]?[0-9])+(?:\.[0-9_]*)?"
                            r"|0b[01_]+|0[0-7_]+|[0-9][0-9_]*_[0-9_]*(?:\.[0-9_]*)?)$")


def _yaml11_hint(value: Any) -> str:
    """Why a plain word or number came through as text (YAML 1.1 readers disagree)."""
    if not isinstance(value, str):
        return ""
    if _YAML11_BOOL.match(value):
        return (f"; this reader follows YAML 1.2, where {shown(value)} is text, not a boolean: "
                "write true or false, or one of the allowed words")
    if _YAML11_NUMBER.match(value):
        return (f"; this reader follows YAML 1.2, where {shown(value)} is text (YAML 1.1 reads "
                "base-60, octal, binary or underscored numbers): write the number in plain "
                "decimal")
    return ""


def _describe_validation_error(exc: ValidationError, text: str, source: str) -> str:
    errors = exc.errors()
    first = errors[0]
    loc = tuple(first["loc"])
    key = _key_path(loc)
    line = _line_of(text, loc)
    where = f"{source}: line {line}: {key}" if line else f"{source}: {key}"
    kind = first["type"]
    if kind == "extra_forbidden":
        parent = _model_at(loc[:-1])
        allowed = ", ".join(parent.model_fields) if parent is not None else "see `gate policy schema`"
        what = f"unknown key; allowed here: {allowed}"
    elif kind == "missing":
        what = "required key is missing"
    else:
        got = first.get("input")
        what = (f"{_lower_first(first['msg'])}, got {shown(got, quote=True)}"
                f"{_yaml11_hint(got)}")
    more = f" (and {len(errors) - 1} more problem{'s' if len(errors) > 2 else ''})" \
        if len(errors) > 1 else ""
    return f"{where}: {what}{more}"


def _key_path(loc: tuple[Any, ...]) -> str:
    parts: list[str] = []
    for item in loc:
        if isinstance(item, int):
            parts.append(f"[{item}]")
        else:
            parts.append(("." if parts else "") + shown(str(item), 80))
    return "".join(parts) or "(top level)"


def _lower_first(message: str) -> str:
    return message[:1].lower() + message[1:]


def _model_at(loc: tuple[Any, ...]) -> type[BaseModel] | None:
    """The pydantic model that owns the key at ``loc`` (to list the allowed keys)."""
    model: type[BaseModel] = Policy
    for item in loc:
        if isinstance(item, int):
            continue
        field = model.model_fields.get(str(item))
        if field is None:
            return None
        annotation = field.annotation
        inner = getattr(annotation, "__args__", None)
        candidate = inner[0] if inner else annotation
        if isinstance(candidate, type) and issubclass(candidate, BaseModel):
            model = candidate
        else:
            return None
    return model


def _line_of(text: str, loc: tuple[Any, ...]) -> int | None:
    """1-based line of the YAML node at ``loc`` (the deepest one that exists)."""
    try:
        node = yaml.compose(text, Loader=_PolicyLoader)
    except yaml.YAMLError:
        return None
    line = None
    for item in loc:
        if isinstance(node, yaml.MappingNode):
            match = next((v for k, v in node.value if k.value == item), None)
            key_node = next((k for k, _ in node.value if k.value == item), None)
            if match is None:
                break
            line = (key_node or match).start_mark.line + 1
            node = match
        elif isinstance(node, yaml.SequenceNode) and isinstance(item, int) and item < len(node.value):
            node = node.value[item]
            line = node.start_mark.line + 1
        else:
            break
    return line


#: Characters that make a name a shell-style glob, and their escaped (literal) forms.
GLOB_SPECIAL = {"*": "[*]", "?": "[?]", "[": "[[]"}


def escape_glob(name: str) -> str:
    """A glob that matches exactly ``name`` (columns.include/exclude are shell-style globs)."""
    return "".join(GLOB_SPECIAL.get(ch, ch) for ch in name)


def today_utc() -> dt.date:
    return dt.datetime.now(dt.UTC).date()
