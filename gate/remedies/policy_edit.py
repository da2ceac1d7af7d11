"""Policy editing for remedies: the preference file, and a policy with drops excluded.

The edit keeps the file's comments where the YAML layout allows (block or flow lists, a missing
``exclude`` or ``columns`` key); otherwise the policy, as the one policy reader parsed it, is
re-serialised with a header comment. Every result is validated by that reader before use.
"""

from __future__ import annotations

import datetime as dt
import json
import re
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import yaml

from gate.errors import PolicyError
from gate.policy.models import Policy, escape_glob, parse_policy, today_utc

if TYPE_CHECKING:
    from gate.remedies.search import Suggestion


def read_preference(path: str | Path) -> list[str]:
    """Feature names, most important first: one per line; '#' starts a comment."""
    file = Path(path)
    try:
        text = file.read_text(encoding="utf-8")
    except OSError as exc:
        raise PolicyError(f"{file}: cannot read the preference file ({exc.strerror or exc})") \
            from None
    except UnicodeDecodeError as exc:
        raise PolicyError(
            f"{file}: the preference file is not UTF-8 (byte 0x{exc.object[exc.start]:02x} at "
            f"offset {exc.start}); convert it, e.g. iconv -f latin1 -t utf-8 '{file}' > "
            "prefer.txt, and pass that file") from None
    names: list[str] = []
    for number, line in enumerate(text.splitlines(), 1):
        name = line.split("#", 1)[0].strip()
        if not name:
            continue
        if name in names:
            raise PolicyError(f"{file}: line {number}: '{name}' is listed twice; list each "
                              "feature once, most important first")
        names.append(name)
    return names


def _yaml_item(value: str) -> str:
    return value if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_.=-]*", value) else json.dumps(value)


def policy_with_exclusions(text: str, drops: Sequence[str], why: str,
                           tag: str = "added by gate suggest") -> str:
    """The policy text with ``drops`` added to columns.exclude and a comment saying why.

    Edits the text in place where the YAML layout allows (block or flow lists, a missing
    exclude or columns key), so the original comments survive; otherwise the policy is
    re-serialised with a header comment. ``why`` is a comment line above the added entries;
    ``tag`` (e.g. "gate suggest 2026-05-04") also ends every line that gains an entry, so the
    entries stay marked when lines are moved or sorted. The result is validated before it is
    returned.
    """
    items = [escape_glob(d) for d in drops]
    comment = f"# {why}"
    for edit in (_edit_in_place, _rewrite):
        candidate = edit(text, items, comment, tag)
        if candidate is None:
            continue
        try:
            policy = parse_policy(candidate, source="<rewritten policy>")
        except PolicyError:
            continue
        if set(items) <= set(policy.columns.exclude):
            return candidate
    raise PolicyError("cannot add the drops to columns.exclude of this policy; add them by "
                      f"hand: {', '.join(items)}")


def _tagged(line: str, tag: str) -> str:
    """``line`` (ending in a newline) with ``# tag`` at its end, after any comment there."""
    body = line.rstrip("\n")
    return f"{body}  # {tag}\n"


def _edit_in_place(text: str, items: list[str], comment: str, tag: str) -> str | None:
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError:
        return None
    if not isinstance(root, yaml.MappingNode):
        return None
    lines = text.splitlines(keepends=True)
    if lines and not lines[-1].endswith("\n"):
        lines[-1] += "\n"
    columns = next(((k, v) for k, v in root.value if k.value == "columns"), None)
    if columns is None:
        body = "".join(lines)
        return body + (f"{comment}\ncolumns:\n  exclude: [{', '.join(map(_yaml_item, items))}]"
                       f"  # {tag}\n")
    _, node = columns
    if not isinstance(node, yaml.MappingNode) or node.flow_style:
        return None
    exclude = next(((k, v) for k, v in node.value if k.value == "exclude"), None)
    if exclude is None:
        if not node.value:
            return None
        indent = " " * node.value[0][0].start_mark.column
        line = node.value[0][0].start_mark.line
        new = [f"{indent}{comment}\n",
               f"{indent}exclude: [{', '.join(map(_yaml_item, items))}]  # {tag}\n"]
        return "".join(lines[:line] + new + lines[line:])
    ex_key, seq = exclude
    indent = " " * ex_key.start_mark.column
    if isinstance(seq, yaml.SequenceNode) and seq.flow_style:
        old = [text[v.start_mark.index:v.end_mark.index] for v in seq.value]
        flow = "[" + ", ".join(old + [_yaml_item(i) for i in items]) + "]"
        body = text[:seq.start_mark.index] + flow + text[seq.end_mark.index:]
        out = body.splitlines(keepends=True)
        if out and not out[-1].endswith("\n"):
            out[-1] += "\n"
        closing = seq.start_mark.line  # the flow list is rewritten onto its first line
        if "\n" in text[seq.start_mark.index:seq.end_mark.index]:
            return None  # a flow list over several lines: re-serialise instead
        out[closing] = _tagged(out[closing], tag)
        at = ex_key.start_mark.line
        return "".join(out[:at] + [f"{indent}{comment}\n"] + out[at:])
    if isinstance(seq, yaml.SequenceNode) and seq.value:
        first = seq.value[0]
        first_line = lines[first.start_mark.line]
        dash = first_line.rfind("-", 0, first.start_mark.column)
        if dash < 0:
            return None
        last = seq.value[-1]
        end_line = last.end_mark.line if last.end_mark.column > 0 else last.end_mark.line - 1
        pad = " " * dash
        new = [f"{pad}{comment}\n"] + [f"{pad}- {_yaml_item(i)}  # {tag}\n" for i in items]
        return "".join(lines[:end_line + 1] + new + lines[end_line + 1:])
    if isinstance(seq, yaml.ScalarNode) and seq.value in ("", "null", "~"):
        flow = "[" + ", ".join(_yaml_item(i) for i in items) + "]"
        line = ex_key.start_mark.line
        new = [f"{indent}{comment}\n", f"{indent}exclude: {flow}  # {tag}\n"]
        return "".join(lines[:line] + new + lines[line + 1:])
    return None


def _rewrite(text: str, items: list[str], comment: str, tag: str) -> str | None:
    """Re-serialise the policy (read by the one policy reader) with the items excluded."""
    try:
        policy = parse_policy(text, source="<policy>")
    except PolicyError:
        return None
    data = policy.model_dump(mode="json", exclude={"source", "sha256"}, exclude_none=True)
    columns = data.setdefault("columns", {})
    exclude = list(columns.get("exclude") or [])
    columns["exclude"] = exclude + [i for i in items if i not in exclude]
    header = f"{comment}\n# (re-serialised: the original file's comments were not kept)\n"
    body = str(yaml.safe_dump(data, sort_keys=False, default_flow_style=False))
    # tag the entries added, inside columns.exclude (safe_dump writes one "- item" per line)
    wanted = {str(yaml.safe_dump([i], default_flow_style=False)).strip() for i in items
              if i not in exclude}
    lines = body.splitlines(keepends=True)
    inside = False
    for n, line in enumerate(lines):
        stripped = line.strip()
        if line.startswith("  exclude:"):
            inside = True
            continue
        if inside and not stripped.startswith("- "):
            inside = line.startswith(("    ", "  - "))
        if inside and stripped in wanted:
            lines[n] = _tagged(line, tag)
            wanted.discard(stripped)
    return header + "".join(lines)


def suggestion_tag(today: dt.date | None = None) -> str:
    """The dated mark on every policy line gate suggest adds an exclusion to."""
    return f"gate suggest {(today or today_utc()).isoformat()}"


def suggestion_comment(suggestion: Suggestion, policy: Policy, today: dt.date | None = None
                       ) -> str:
    """The comment written above the added exclusions."""
    limits = policy.limits
    failing = [f"{name} > {getattr(limit, 'max', '')}".rstrip(" >") for name, limit in (
        ("vif", limits.vif), ("pairwise_correlation", limits.pairwise_correlation),
        ("condition_number", limits.condition_number),
        ("rank_deficiency", limits.rank_deficiency)) if limit.level == "fail"]
    when = (today or today_utc()).isoformat()
    return (f"gate suggest {when}: excluded {', '.join(suggestion.drops)} so every fail-level "
            f"limit passes ({'; '.join(failing)})")
