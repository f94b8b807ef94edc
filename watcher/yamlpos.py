"""Load YAML keeping the line and column of every node, for error messages.

``yaml.compose`` gives a node tree with marks; we turn it into plain Python
values (safe_load semantics: only standard tags) and keep, for every key path,
where the key (or the list item) stands in the file.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from typing import Any

import yaml

Path = tuple[str | int, ...]

_ENV = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)\}")


@dataclass(frozen=True)
class Pos:
    line: int  # 1-based
    column: int  # 1-based


class YamlError(Exception):
    def __init__(self, file: str, pos: Pos | None, message: str):
        self.file, self.pos, self.message = file, pos, message
        where = f"{file}:{pos.line}:{pos.column}" if pos else file
        super().__init__(f"{where}: {message}")


def path_text(path: Path) -> str:
    out = ""
    for p in path:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "(top level)"


class Positioned:
    """Plain values plus a map from key path to position."""

    def __init__(self, file: str, text: str, env: dict[str, str] | None = None):
        self.file = file
        self.positions: dict[Path, Pos] = {}
        self.env_errors: list[tuple[Path, str]] = []
        self._env = os.environ if env is None else env
        try:
            node = yaml.compose(text, Loader=yaml.SafeLoader)
        except yaml.MarkedYAMLError as e:
            mark = e.problem_mark
            pos = Pos(mark.line + 1, mark.column + 1) if mark else None
            raise YamlError(file, pos, f"not valid YAML: {e.problem}") from None
        except yaml.YAMLError as e:  # pragma: no cover - unmarked errors are rare
            raise YamlError(file, None, f"not valid YAML: {e}") from None
        self.value = {} if node is None else self._build(node, ())

    def pos(self, path: Path) -> Pos | None:
        while path:
            if path in self.positions:
                return self.positions[path]
            path = path[:-1]
        return self.positions.get(())

    def _mark(self, path: Path, node: yaml.Node) -> None:
        self.positions.setdefault(path, Pos(node.start_mark.line + 1, node.start_mark.column + 1))

    def _build(self, node: yaml.Node, path: Path) -> Any:
        self._mark(path, node)
        if isinstance(node, yaml.MappingNode):
            out: dict[str, Any] = {}
            for knode, vnode in node.value:
                key = str(self._scalar(knode))
                kp = path + (key,)
                self.positions[kp] = Pos(knode.start_mark.line + 1, knode.start_mark.column + 1)
                out[key] = self._build(vnode, kp)
            return out
        if isinstance(node, yaml.SequenceNode):
            return [self._build(v, path + (i,)) for i, v in enumerate(node.value)]
        value = self._scalar(node)
        if isinstance(value, str) and "${" in value:
            value = self._substitute(value, path)
        return value

    @staticmethod
    def _scalar(node: yaml.Node) -> Any:
        return _construct(node)

    def _substitute(self, text: str, path: Path) -> str:
        def repl(m: re.Match[str]) -> str:
            name = m.group(1)
            if name not in self._env:
                self.env_errors.append((path, f"environment variable {name} is not set"))
                return ""
            return self._env[name]

        return _ENV.sub(repl, text)


def _construct(node: yaml.Node) -> Any:
    loader = yaml.SafeLoader("")
    try:
        return loader.construct_object(node, deep=True)
    finally:
        loader.dispose()
