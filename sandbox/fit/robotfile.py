"""Write a robot file with fitted values in place, a comment beside each.

The YAML text is written here (not by a YAML library) so that every fitted value carries
its comment: what was fitted, from which log, with the 95 % interval. Values stay SI.
"""

from __future__ import annotations

import json
import math
from typing import Any

import yaml


def set_dotted(data: dict, dotted: str, value: Any) -> None:
    node = data
    keys = dotted.split(".")
    for key in keys[:-1]:
        node = node.setdefault(key, {})
    node[keys[-1]] = value


def get_dotted(data: dict, dotted: str, default: Any = None) -> Any:
    node: Any = data
    for key in dotted.split("."):
        if not isinstance(node, dict) or key not in node:
            return default
        node = node[key]
    return node


def _scalar(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isfinite(value):
            return repr(float(f"{value:.6g}"))
        return ".nan"
    if isinstance(value, int):
        return str(value)
    if value is None:
        return "null"
    text = str(value)
    dumped = yaml.safe_dump(text, default_flow_style=True).strip()
    return dumped.removesuffix("\n...").strip()


def _flow(value: Any) -> str:
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k}: {_flow(v)}" for k, v in value.items()) + "}"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_flow(v) for v in value) + "]"
    return _scalar(value)


def emit(data: dict, comments: dict[str, str], header: str = "") -> str:
    """YAML text of ``data``; ``comments`` maps dotted keys to a comment for that line."""
    lines = [f"# {line}" if line else "#" for line in header.splitlines()]

    def walk(node: dict, prefix: str, indent: int) -> None:
        for key, value in node.items():
            dotted = f"{prefix}{key}"
            pad = "  " * indent
            note = comments.get(dotted)
            if isinstance(value, dict) and value and (
                    any(k.startswith(dotted + ".") for k in comments) or indent == 0):
                lines.append(f"{pad}{key}:")
                walk(value, dotted + ".", indent + 1)
                continue
            if isinstance(value, list) and value and isinstance(value[0], dict):
                lines.append(f"{pad}{key}:")
                for item in value:
                    lines.append(f"{pad}  - {_flow(item)}")
                continue
            text = f"{pad}{key}: {_flow(value)}"
            lines.append(f"{text}  # {note}" if note else text)

    walk(data, "", 0)
    text = "\n".join(lines) + "\n"
    yaml.safe_load(text)  # what we write must read back
    return text


def json_number(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def dumps(result: dict) -> str:
    return json.dumps(result, indent=2, default=json_number)
