"""The policy file: which columns form the design, the limits, and the waivers.

A policy is YAML read with ``yaml.safe_load`` (the only YAML loading in the project) into frozen
pydantic models that reject unknown keys. Every error names the file, the key path, the line
(where YAML knows it) and what is allowed.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import stat
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    field_validator,
)

from gate.errors import PolicyError


def _yaml_off(value: Any) -> Any:
    """YAML 1.1 reads a bare `off` as false; the policy means the level "off"."""
    return "off" if value is False else value


Level = Annotated[Literal["fail", "warn", "off"], BeforeValidator(_yaml_off)]
RuleName = Literal["pairwise_correlation", "vif", "condition_number", "rank_deficiency"]
RULES: tuple[str, ...] = ("pairwise_correlation", "vif", "condition_number", "rank_deficiency")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class ColumnSelection(_Strict):
    """Which table columns become design columns, and how."""

    include: list[str] = Field(default_factory=lambda: ["*"], description="Shell-style globs.")
    exclude: list[str] = Field(default_factory=list, description="Shell-style globs, applied last.")
    categorical: list[str] = Field(
        default_factory=list,
        description="Columns one-hot encoded (first sorted level is the reference), one group each.",
    )
    weight: str | None = Field(default=None, description="Column of non-negative row weights.")


class CorrelationLimit(_Strict):
    max: float = Field(default=0.8, gt=0, le=1, description="|r| >= max breaches.")
    level: Level = "warn"
    method: Literal["pearson"] = "pearson"


class VifLimit(_Strict):
    max: float = Field(default=5.0, gt=1, description="VIF > max breaches; groups use GVIF^(1/df).")
    level: Level = "fail"


class ConditionLimit(_Strict):
    max: float = Field(default=30.0, gt=1, description="Condition index > max breaches.")
    level: Level = "warn"
    scaling: Literal["unit_length", "standardized"] = "unit_length"
    proportion: float = Field(
        default=0.5, gt=0, le=1,
        description="Variance-decomposition proportion at which a feature counts as involved.",
    )


class RankLimit(_Strict):
    level: Level = "fail"
    tolerance: float | None = Field(
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
    features: list[str] = Field(min_length=1)
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

    by: list[str] = Field(min_length=1, description="Columns whose value combinations form "
                          "the segments.")
    min_rows: int = Field(default=30, ge=2, description="Segments with fewer used rows are "
                          "reported, not judged.")


class Policy(_Strict):
    """A validated policy. Build it with :func:`load_policy` or ``Policy.model_validate``."""

    policy_version: Literal[1] = 1
    name: str = Field(min_length=1)
    description: str = ""
    columns: ColumnSelection = Field(default_factory=ColumnSelection)
    missing: Literal["drop_rows", "fail"] = "drop_rows"
    limits: Limits = Field(default_factory=Limits)
    waivers: list[Waiver] = Field(default_factory=list)
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
        canonical = json.dumps(self.model_dump(mode="json"), sort_keys=True).encode()
        return hashlib.sha256(canonical).hexdigest()


DEFAULT_POLICY = "default.yaml"


def packaged_policy_path(name: str = DEFAULT_POLICY) -> Path:
    """Path of a policy shipped with the package (``default.yaml``, ``exploratory.yaml``)."""
    return Path(str(resources.files("gate.policies").joinpath(name)))


def load_policy(path: str | Path | None = None) -> Policy:
    """Read and validate a policy file; ``None`` loads the packaged default policy."""
    file = packaged_policy_path() if path is None else Path(path)
    try:
        if not stat.S_ISREG(file.stat().st_mode):  # never open a FIFO or device: it may block
            raise PolicyError(f"{file}: not a regular file (a folder, FIFO, device or socket); "
                              "pass a policy YAML file")
        raw = file.read_bytes()
    except FileNotFoundError:
        raise PolicyError(f"{file}: policy file not found; check the path or omit --policy "
                          "to use the packaged default") from None
    except OSError as exc:
        raise PolicyError(f"{file}: cannot read policy file ({exc.strerror})") from None
    return parse_policy(raw, source=str(file))


def parse_policy(raw: bytes | str, *, source: str = "<policy>") -> Policy:
    """Validate policy YAML text; ``source`` names it in error messages."""
    data = raw if isinstance(raw, bytes) else raw.encode()
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise PolicyError(f"{source}: policy file is not UTF-8 text") from None
    try:
        content = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f": line {mark.line + 1}" if mark is not None else ""
        problem = getattr(exc, "problem", None) or "invalid YAML"
        raise PolicyError(f"{source}{where}: not valid YAML ({problem}); fix the syntax") from None
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
        what = f"{_lower_first(first['msg'])}, got {got!r}"
    more = f" (and {len(errors) - 1} more problem{'s' if len(errors) > 2 else ''})" \
        if len(errors) > 1 else ""
    return f"{where}: {what}{more}"


def _key_path(loc: tuple[Any, ...]) -> str:
    parts: list[str] = []
    for item in loc:
        if isinstance(item, int):
            parts.append(f"[{item}]")
        else:
            parts.append(("." if parts else "") + str(item))
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
        node = yaml.compose(text, Loader=yaml.SafeLoader)
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
