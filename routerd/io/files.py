"""Reading input files and checking output paths, the same way for every command.

Owns: :func:`read_yaml` (the one reader of a YAML input: a missing file, a directory, an
unreadable or binary file and bad YAML each become an :class:`InputError` naming the file),
the YAML loader every reader uses (:class:`Loader`: PyYAML's safe loader that also reads
YAML 1.2's exponent spellings ``1.0e6`` / ``1e6`` as numbers, by
:data:`routerd.io.values.EXPONENT_RE`), and :func:`output_dir` / :func:`output_file`: an
output path checked *before* a command starts its work, so a bad ``--out`` costs nothing.
Must not import: anything of routerd but ``routerd.core.errors`` and ``routerd.io.values``.
"""
from __future__ import annotations

import os
import re
import tempfile
from typing import Any

import yaml

from routerd.core.errors import InputError, Problem

from .values import EXPONENT_RE


class _SafeLoader(getattr(yaml, "CSafeLoader", yaml.SafeLoader)):  # type: ignore[misc]
    """The safe loader (libyaml's parser when present: a 200-node topology file read in
    about a tenth of the pure-Python parser's 0.8 s) plus YAML 1.2's exponent spellings as
    floats.  Keeps the last of a key given twice, as PyYAML does: for a reader that
    reports every repeated key itself (the allow file's, :mod:`routerd.io.security`)."""


class Loader(_SafeLoader):
    """:class:`_SafeLoader` with a key given twice in one mapping refused (YAML 1.2 requires
    keys to be unique; PyYAML keeps the last silently, so a second ``links:`` or ``alpha:``
    dropped the first without a word).  Merge keys (``<<``) may still be overridden."""

    def construct_mapping(self, node: Any, deep: bool = False) -> Any:
        if isinstance(node, yaml.MappingNode):
            seen: dict[Any, int] = {}
            for key_node, _ in node.value:
                if not isinstance(key_node, yaml.ScalarNode) or key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node)
                if key in seen:
                    raise yaml.constructor.ConstructorError(
                        "while constructing a mapping", node.start_mark,
                        f"found the key {key!r} twice (first at line {seen[key] + 1})",
                        key_node.start_mark)
                seen[key] = key_node.start_mark.line
        return super().construct_mapping(node, deep=deep)


class Dumper(getattr(yaml, "CSafeDumper", yaml.SafeDumper)):  # type: ignore[misc]
    """The safe dumper (libyaml's when present) quoting strings :class:`Loader` would read
    as numbers, so a document read back gives the same values."""


# PyYAML tries a resolver with re.match: anchored at both ends, or a plain string that
# merely starts like a number ("19e1f497...", a content id) would be read as one
_ANCHORED = re.compile(f"^(?:{EXPONENT_RE.pattern})$")
for _cls in (_SafeLoader, Dumper):
    _cls.add_implicit_resolver("tag:yaml.org,2002:float", _ANCHORED, list("-+0123456789."))


def parse_yaml(text: str, *, unique_keys: bool = True) -> Any:
    """The document in ``text`` (:class:`Loader`; ``unique_keys=False``: a repeated key's
    last value, for a reader that reports repeats itself); ``yaml.YAMLError`` as PyYAML
    raises it."""
    return yaml.load(text, Loader=Loader if unique_keys else _SafeLoader)  # noqa: S506 - safe loaders


def dump_yaml(doc: Any, **kw: Any) -> str:
    """``doc`` as YAML text that :func:`parse_yaml` reads back to the same values."""
    return yaml.dump(doc, Dumper=Dumper, **kw)


def read_text(path: str, error: type[InputError] = InputError, what: str = "file") -> str:
    """The UTF-8 text of the file at ``path``, or ``error`` naming it and why it cannot be
    read: missing, a directory, no permission, not text."""
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        raise error(Problem(path, path, "does not exist")) from None
    except IsADirectoryError:
        raise error(Problem(path, path, f"is a directory, not a {what}")) from None
    except OSError as e:
        raise error(Problem(path, path, f"cannot be read: {e.strerror or e}")) from None
    if b"\0" in data:
        raise error(Problem(path, path, f"is a binary file, not a {what} (it holds NUL bytes)"))
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise error(Problem(path, path, f"is not a UTF-8 text {what} (byte 0x{data[e.start]:02x} "
                                        f"at offset {e.start})")) from None


def read_yaml(path: str, error: type[InputError] = InputError) -> Any:
    """The document of the YAML file at ``path`` (:class:`Loader`), or ``error`` naming the
    file: it cannot be read (:func:`read_text`) or is not valid YAML (the parser's position)."""
    text = read_text(path, error, "YAML file")
    try:
        return parse_yaml(text)
    except yaml.YAMLError as e:
        raise error(Problem(path, None, yaml_error_rule(e))) from None


def yaml_error_rule(e: yaml.YAMLError) -> str:
    """"is not valid YAML: <what>, at line L, column C" from the parser's error (its position
    in the file, 1-based, rather than the parser's own "<unicode string>" wording)."""
    what = getattr(e, "problem", None) or str(e).splitlines()[0]
    ctx = getattr(e, "context", None)
    mark = getattr(e, "problem_mark", None)
    where = f", at line {mark.line + 1}, column {mark.column + 1}" if mark is not None else ""
    return f"is not valid YAML: {what}{f' ({ctx})' if ctx else ''}{where}"


def _nearest_existing(path: str) -> str:
    p = os.path.abspath(path)
    while not os.path.lexists(p):
        up = os.path.dirname(p)
        if up == p:
            break
        p = up
    return p


def _probe(directory: str) -> str | None:
    """Why files cannot be created in ``directory`` (tried, then removed), or None."""
    try:
        fd, tmp = tempfile.mkstemp(prefix=".routerd-probe-", dir=directory)
    except OSError as e:
        return e.strerror or str(e)
    os.close(fd)
    os.unlink(tmp)
    return None


def output_dir(path: str, flag: str = "--out") -> str:
    """``path`` (absolute) when a command can write its results there: an existing directory
    it can create files in, or a path whose nearest existing ancestor is such a directory
    (created later, by the writer).  Else :class:`InputError` naming ``flag`` and why.
    Creates nothing that stays."""
    p = os.path.abspath(path)
    if os.path.exists(p) and not os.path.isdir(p):
        raise InputError(Problem(flag, path, "is an existing file, not a directory"))
    anc = _nearest_existing(p)
    if not os.path.isdir(anc):
        raise InputError(Problem(flag, path, f"cannot be created: {anc} is not a directory"))
    why = _probe(anc)
    if why is not None:
        where = "" if anc == p else f" (in {anc})"
        raise InputError(Problem(flag, path, f"is not writable{where}: {why}"))
    return p


def output_file(path: str, flag: str) -> str:
    """``path`` (absolute) when a command can write a file there (an existing file is
    replaced); else :class:`InputError` naming ``flag`` and why."""
    p = os.path.abspath(path)
    if os.path.isdir(p):
        raise InputError(Problem(flag, path, "is a directory, not a file"))
    if os.path.exists(p):
        if not os.access(p, os.W_OK):
            raise InputError(Problem(flag, path, "is not writable"))
        return p
    output_dir(os.path.dirname(p), flag)
    return p
