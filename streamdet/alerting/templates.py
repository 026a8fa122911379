"""Annotation templates: literal text with ``{name}`` placeholders, nothing more.

A template is parsed once (at config time) into literal parts and names; rendering looks each
name up in a flat mapping of strings and pastes the value in. There is no attribute access, no
indexing, no format spec, no evaluation, and a pasted value is never scanned again, so a label
value such as ``{__class__}`` or ``${x}`` comes out as exactly that text. ``{{`` and ``}}`` are
literal braces; ``{name|url}`` percent-encodes the value for use inside a URL.

>>> Template.parse("runbook for {shop}: {{braces}}").render({"shop": "web-1"})
'runbook for web-1: {braces}'
>>> Template.parse("{shop}").render({"shop": "{__class__}"})
'{__class__}'
"""

from __future__ import annotations

import re
import urllib.parse
from collections.abc import Mapping
from dataclasses import dataclass

NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,63}")
FILTERS = ("url",)
MAX_VALUE = 1024  # characters of one pasted value; longer ones are cut and end in "..."
MAX_OUTPUT = 4096  # characters of one rendered template


class TemplateError(ValueError):
    """A template that cannot be parsed; the message says where and why."""


@dataclass(frozen=True, slots=True)
class Template:
    """Parsed template: ``parts`` alternate literal text and ``(name, filter)`` pairs."""

    source: str
    parts: tuple[str | tuple[str, str | None], ...]

    @classmethod
    def parse(cls, text: str) -> Template:
        if not isinstance(text, str):
            raise TemplateError(f"expected text, got {type(text).__name__}")
        parts: list[str | tuple[str, str | None]] = []
        literal: list[str] = []
        i, n = 0, len(text)
        while i < n:
            c = text[i]
            if c == "{" and text.startswith("{{", i):
                literal.append("{")
                i += 2
            elif c == "}" and text.startswith("}}", i):
                literal.append("}")
                i += 2
            elif c == "{":
                end = text.find("}", i + 1)
                if end < 0:
                    raise TemplateError(f"'{{' at position {i} is never closed (write '{{{{' for a "
                                        "literal brace)")
                inner = text[i + 1:end]
                name, _, flt = inner.partition("|")
                if not NAME.fullmatch(name):
                    raise TemplateError(f"{{{inner}}} at position {i}: a placeholder is a plain name "
                                        "(letters, digits, underscore), optionally followed by |url")
                if flt and flt not in FILTERS:
                    raise TemplateError(f"{{{inner}}} at position {i}: unknown filter {flt!r} "
                                        f"(known: {', '.join(FILTERS)})")
                if literal:
                    parts.append("".join(literal))
                    literal = []
                parts.append((name, flt or None))
                i = end + 1
            elif c == "}":
                raise TemplateError(f"'}}' at position {i} has no opening brace (write '}}}}' for a "
                                    "literal brace)")
            else:
                literal.append(c)
                i += 1
        if literal:
            parts.append("".join(literal))
        return cls(text, tuple(parts))

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p[0] for p in self.parts if isinstance(p, tuple))

    def render(self, values: Mapping[str, str]) -> str:
        """The text with each placeholder replaced; a name without a value becomes ''."""
        out: list[str] = []
        for p in self.parts:
            if isinstance(p, str):
                out.append(p)
                continue
            value = values.get(p[0], "")
            value = value if isinstance(value, str) else str(value)
            if len(value) > MAX_VALUE:
                value = value[:MAX_VALUE - 3] + "..."
            if p[1] == "url":
                value = urllib.parse.quote(value, safe="")
            out.append(value)
        text = "".join(out)
        return text if len(text) <= MAX_OUTPUT else text[:MAX_OUTPUT - 3] + "..."
