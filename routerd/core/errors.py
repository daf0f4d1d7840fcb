"""Error types shared by every module.

Owns: the split between *input* errors (a file, a config or a peer gave us something
wrong: reported to the user, never fatal to a running service) and everything else
(our own bugs, which should fail loudly).  Pure values: reading files is
:mod:`routerd.io.files`' job (``read_yaml``).
Must not import: anything (the standard library's dataclasses only).
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Problem:
    """One thing wrong with an input: where it is, what the value was, which rule it broke."""

    where: str  # "file: key.path" or "file: element"
    value: object
    rule: str

    def __str__(self) -> str:
        if self.value is None:   # nothing was given (a missing key, a YAML null): say only the rule
            return f"{self.where}: {self.rule}"
        return f"{self.where}: {self.value!r} {self.rule}"


class InputError(Exception):
    """An input file or value is invalid. Carries every problem found, not just the first."""

    def __init__(self, problems: list[Problem] | Problem | str):
        if isinstance(problems, (Problem, str)):
            problems = [problems]  # type: ignore[list-item]
        self.problems: list[Problem | str] = list(problems)  # type: ignore[arg-type]
        super().__init__("\n".join(str(p) for p in self.problems))


class TopologyError(InputError):
    """A topology file or reference cannot be turned into a valid topology."""


class ConfigError(InputError):
    """A config file or override breaks the config schema."""
