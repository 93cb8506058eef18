"""The one strict YAML reader of wbexplore (catalogs and selection files).

Plain ``yaml.safe_load`` accepts things that make a file mean something other than what it
shows: a repeated key silently replaces the first (a second ``sources:`` drops every earlier
source), aliases let a few hundred bytes expand into billions of nodes when the value is used,
deep nesting overflows the recursive composer, and YAML 1.1 turns unquoted keys such as ``0123``
or ``on`` into numbers and booleans. This reader refuses each of them with one line naming the
file, the line and what to write instead.
"""

from __future__ import annotations

import os

import yaml

from ..errors import InputError

__all__ = ["MAX_DEPTH", "load_yaml"]

# Catalogs and selection files nest four or five levels; 50 leaves room for any hand-written file
# while keeping the recursive composer far from Python's recursion limit.
MAX_DEPTH = 50

_Loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)

# Only the plain data types of the YAML core schema may be named by an explicit tag.
_ALLOWED_TAGS = {None, "!", "tag:yaml.org,2002:str", "tag:yaml.org,2002:int", "tag:yaml.org,2002:float",
                 "tag:yaml.org,2002:bool", "tag:yaml.org,2002:null", "tag:yaml.org,2002:map",
                 "tag:yaml.org,2002:seq"}


def _line(mark) -> int:
    return mark.line + 1 if mark is not None else 0


class _StrictLoader(_Loader):
    """SafeLoader whose mappings refuse repeated keys, merge keys and keys that are not text."""

    source = "<yaml>"
    error = InputError

    def construct_mapping(self, node, deep=False):
        if not isinstance(node, yaml.MappingNode):  # pragma: no cover - the composer only passes mappings
            return super().construct_mapping(node, deep=deep)
        seen: dict = {}
        out = {}
        for key_node, value_node in node.value:
            line = _line(key_node.start_mark)
            if key_node.tag == "tag:yaml.org,2002:merge":
                raise self.error(f"{self.source}: line {line}: merge key '<<' is not supported; write the values out")
            key = self.construct_object(key_node, deep=deep)
            if not isinstance(key, str):
                # name the key as written: YAML 1.1 reads 0123 as the octal 83, a gauge code as a number
                shown = key_node.value if isinstance(key_node, yaml.ScalarNode) else repr(key)
                raise self.error(f"{self.source}: line {line}: key {shown} is not text; put it in quotes")
            if key in seen:
                raise self.error(f"{self.source}: line {line}: duplicate key {key!r} (first on line {seen[key]})")
            seen[key] = line
            out[key] = self.construct_object(value_node, deep=deep)
        return out



def _check_events(data, source, error) -> None:
    """Depth, aliases and tags checked on the event stream (the parser is not recursive)."""
    depth = 0
    for ev in yaml.parse(data, Loader=_Loader):
        if isinstance(ev, yaml.AliasEvent):
            raise error(f"{source}: line {_line(ev.start_mark)}: alias '*{ev.anchor}' is not allowed; "
                        "write the value out in full")
        if isinstance(ev, (yaml.ScalarEvent, yaml.CollectionStartEvent)) and ev.tag not in _ALLOWED_TAGS:
            raise error(f"{source}: line {_line(ev.start_mark)}: tag {ev.tag!r} is not allowed "
                        "(plain text, numbers, true/false, lists and mappings only)")
        if isinstance(ev, yaml.CollectionStartEvent):
            depth += 1
            if depth > MAX_DEPTH:
                raise error(f"{source}: line {_line(ev.start_mark)}: lists and mappings nested deeper than "
                            f"{MAX_DEPTH} levels")
        elif isinstance(ev, yaml.CollectionEndEvent):
            depth -= 1


def load_yaml(data: str | bytes, *, source: str | os.PathLike, error: type[InputError] = InputError):
    """Parse one YAML document strictly.

    Parameters
    ----------
    data : the document, as text or bytes (UTF-8/16 detected as YAML specifies)
    source : the file name used in messages
    error : the `InputError` subclass to raise (e.g. `CatalogError`, `SelectionError`)

    Returns
    -------
    The document as plain Python objects (dict, list, str, int, float, bool, None).

    Raises
    ------
    error
        One line naming ``source`` and the line at fault for: malformed YAML, a repeated key,
        an alias (refused on sight, so an alias bomb costs one pass over its text), a merge key,
        a tag other than the core data types, a key that is not text, nesting deeper than
        `MAX_DEPTH`.
    """
    source = str(source)
    try:
        _check_events(data, source, error)
        loader = _StrictLoader(data)
        loader.source, loader.error = source, error
        try:
            return loader.get_single_data()
        finally:
            loader.dispose()
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None) or getattr(exc, "context_mark", None)
        where = f" at line {_line(mark)}" if mark is not None else ""
        raise error(f"{source}: not valid YAML{where}") from None
